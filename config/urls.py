from django.contrib import admin
from django.urls import include, path

urlpatterns = [
    path("admin/", admin.site.urls),
    path("accounts/", include("django.contrib.auth.urls")),
    path("field/", include("register.urls_field")),
    path("deferrals/", include("register.urls_deferral")),
    path("api/", include("register.api.urls")),
    path("audit/", include("register.urls_audit")),
    path("", include("register.urls")),
]
