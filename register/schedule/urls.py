from django.urls import path

from register.schedule import views as v

app_name = "deferrals"

urlpatterns = [
    path("", v.deferral_list, name="list"),
    path("plans/<int:plan_id>/new/", v.request_deferral, name="request"),
    path("<int:pk>/decide/", v.decide, name="decide"),
]
