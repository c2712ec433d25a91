from django.urls import path

from register.operations import views

app_name = "operations"

urlpatterns = [
    path("", views.home, name="home"),
    path("sifs/<int:sif_id>/bypass/", views.bypass_new, name="bypass_new"),
    path("sifs/<int:sif_id>/demand/", views.demand_new, name="demand_new"),
    path("bypasses/<int:pk>/", views.bypass_detail, name="bypass"),
    path("bypasses/<int:pk>/authorise/", views.bypass_authorise, name="bypass_authorise"),
    path("bypasses/<int:pk>/close/", views.bypass_close, name="bypass_close"),
    path("findings/", views.finding_list, name="findings"),
    path("findings/<int:pk>/", views.finding_detail, name="finding"),
    path("findings/<int:pk>/update/", views.finding_update, name="finding_update"),
    path("findings/<int:pk>/close/", views.finding_close, name="finding_close"),
]
