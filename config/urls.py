from django.contrib import admin
from django.urls import include, path

from register.views_auth import ThrottledAdminLoginView, ThrottledLoginView

urlpatterns = [
    path("admin/login/", ThrottledAdminLoginView.as_view(), name="admin_login"),
    path("admin/", admin.site.urls),
    path("accounts/login/", ThrottledLoginView.as_view(), name="login"),
    path("accounts/", include("django.contrib.auth.urls")),
    path("field/", include("register.urls_field")),
    path("deferrals/", include("register.urls_deferral")),
    path("api/", include("register.api.urls")),
    path("audit/", include("register.urls_audit")),
    path("", include("register.urls")),
]
