from django.urls import path

from . import views

app_name = "register"

urlpatterns = [
    path("", views.home, name="home"),
    path("sifs/<int:pk>/", views.sif_detail, name="sif_detail"),
    path("tests/<int:pk>/", views.test_detail, name="test_detail"),
]
