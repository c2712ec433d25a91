"""Sign-in with a limit on failed attempts.

After ``LOGIN_MAX_FAILURES`` failed attempts for one user name, or from one address,
within ``LOGIN_LOCK_SECONDS``, further attempts are refused (HTTP 429) until the window
has passed, so passwords cannot be guessed at speed. Counts live in Django's cache
(shared between processes when the cache is Redis).
"""

from django.conf import settings
from django.contrib.auth import views as auth_views
from django.core.cache import cache

LOGIN_MAX_FAILURES = getattr(settings, "LOGIN_MAX_FAILURES", 5)
LOGIN_LOCK_SECONDS = getattr(settings, "LOGIN_LOCK_SECONDS", 15 * 60)


def _keys(request) -> list[str]:
    address = request.META.get("REMOTE_ADDR", "unknown")
    username = (request.POST.get("username") or "").strip().lower()
    keys = [f"ledger:login:addr:{address}"]
    if username:
        keys.append(f"ledger:login:user:{username}")
    return keys


class ThrottledLoginView(auth_views.LoginView):
    def post(self, request, *args, **kwargs):
        keys = _keys(request)
        if any(cache.get(k, 0) >= LOGIN_MAX_FAILURES for k in keys):
            form = self.get_form()
            form.add_error(None, "Too many failed sign-in attempts. Wait 15 minutes and "
                                 "try again, or ask your site administrator.")
            return self.render_to_response(self.get_context_data(form=form), status=429)
        return super().post(request, *args, **kwargs)

    def form_invalid(self, form):
        for key in _keys(self.request):
            cache.add(key, 0, LOGIN_LOCK_SECONDS)
            try:
                cache.incr(key)
            except ValueError:
                cache.set(key, 1, LOGIN_LOCK_SECONDS)
        return super().form_invalid(form)

    def form_valid(self, form):
        for key in _keys(self.request):
            if key.startswith("ledger:login:user:"):
                cache.delete(key)
        return super().form_valid(form)


class ThrottledAdminLoginView(ThrottledLoginView):
    """The admin's sign-in page under the same limit."""

    template_name = "admin/login.html"

    def get_form_class(self):
        from django.contrib.admin.forms import AdminAuthenticationForm

        return AdminAuthenticationForm

    def get_context_data(self, **kwargs):
        from django.contrib import admin

        context = super().get_context_data(**kwargs)
        context.update(admin.site.each_context(self.request))
        context.setdefault("title", "Log in")
        context.setdefault("app_path", self.request.get_full_path())
        return context
