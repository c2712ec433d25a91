from django.contrib import admin
from django.shortcuts import redirect
from django.templatetags.static import static
from django.urls import include, path

from register.accounts.landing import landing
from register.accounts.views import LimitedPasswordResetView

urlpatterns = [
    path("admin/", admin.site.urls),
    path("accounts/password_reset/", LimitedPasswordResetView.as_view(),
         name="password_reset"),
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
