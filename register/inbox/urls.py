from django.urls import path

from register.inbox import views

app_name = "inbox"

urlpatterns = [
    path("", views.inbox, name="list"),
    path("<int:pk>/read/", views.read, name="read"),
    path("read-all/", views.read_all, name="read_all"),
]
