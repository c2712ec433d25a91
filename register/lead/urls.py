from django.urls import path

from register.lead import change as views_lead
from register.lead import export_jobs, import_jobs, views

app_name = "register"

urlpatterns = [
    path("", views.home, name="home"),
    path("sifs/", views.sif_list, name="sif_list"),
    path("sifs/export.<str:fmt>", views.sif_export, name="sif_export"),
    path("sifs/list.<str:fmt>", views.sif_list_export, name="sif_list_export"),
    path("sifs/export-jobs/<int:pk>/", export_jobs.export_job, name="export_job"),
    path("sifs/export-jobs/<int:pk>/status.json", export_jobs.export_job_status,
         name="export_job_status"),
    path("sifs/export-jobs/<int:pk>/download/", export_jobs.export_job_download,
         name="export_job_download"),
    path("sifs/<int:pk>/", views.sif_detail, name="sif_detail"),
    path("sifs/<int:pk>/chart/<str:which>.svg", views.sif_chart, name="sif_chart"),
    path("tests/<int:pk>/", views.test_detail, name="test_detail"),
    path("design/<str:kind>/<int:pk>/edit/", views_lead.edit_design, name="edit_design"),
    path("import/", views_lead.import_sheet, name="import"),
    path("import/jobs/<int:pk>/", import_jobs.import_job, name="import_job"),
    path("import/jobs/<int:pk>/status.json", import_jobs.import_job_status,
         name="import_job_status"),
]
