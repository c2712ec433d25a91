from django.contrib import admin
from django.shortcuts import redirect
from django.templatetags.static import static
from django.urls import include, path

from register.accounts.landing import landing
from register.accounts.views import ThrottledAdminLoginView, ThrottledLoginView

urlpatterns = [
    path("admin/login/", ThrottledAdminLoginView.as_view(), name="admin_login"),
    path("admin/", admin.site.urls),
    path("accounts/login/", ThrottledLoginView.as_view(), name="login"),
    path("start/", landing, name="landing"),
    path("favicon.ico", lambda request: redirect(static("favicon.svg"), permanent=True)),
    path("accounts/", include("django.contrib.auth.urls")),
    path("field/", include("register.field.urls")),
    path("deferrals/", include("register.schedule.urls")),
    path("inbox/", include("register.inbox.urls")),
    path("operations/", include("register.operations.urls")),
    path("api/", include("register.api.urls")),
    path("audit/", include("register.audit.urls")),
    path("", include("register.lead.urls")),
]
