from django.urls import path

from register.field import views

app_name = "field"

urlpatterns = [
    path("", views.worklist, name="worklist"),
    path("plans/<int:plan_id>/start/", views.start, name="start"),
    path("plans/<int:plan_id>/judge/<int:component_id>/", views.judge, name="judge"),
    path("records/<int:pk>/", views.record_detail, name="record_detail"),
    path("records/<int:pk>/edit/", views.record_edit, name="record_edit"),
    path("records/<int:pk>/discard/", views.record_discard, name="record_discard"),
    path("records/<int:pk>/verify/", views.record_verify, name="record_verify"),
    path("records/<int:pk>/correct/", views.record_correct, name="record_correct"),
    path("verify/", views.verify_queue, name="verify_queue"),
    path("attachments/<int:pk>/", views.attachment_download, name="attachment"),
]
