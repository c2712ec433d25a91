"""Password-reset requests, limited per address.

Failed sign-ins are limited by django-axes (see ``register.accounts.signin``); a reset
request does not sign anyone in, so it is limited separately: ``PASSWORD_RESET_RATE``
requests per address (DRF's rate throttle, counted in the cache), then the form says when
to try again (HTTP 429) and sends nothing.
"""

import math

from django.contrib.auth import views as auth_views
from rest_framework.throttling import AnonRateThrottle

from register.accounts.signin import client_address


class ResetRequestThrottle(AnonRateThrottle):
    """Counts reset requests per address, signed in or not."""

    scope = "password_reset"

    def get_ident(self, request):
        return client_address(request)

    def get_cache_key(self, request, view):
        return self.cache_format % {"scope": self.scope, "ident": self.get_ident(request)}


class LimitedPasswordResetView(auth_views.PasswordResetView):
    def post(self, request, *args, **kwargs):
        throttle = ResetRequestThrottle()
        if not throttle.allow_request(request, self):
            minutes = max(1, math.ceil((throttle.wait() or 60) / 60))
            form = self.get_form()
            form.is_valid()
            form.add_error(None, f"Too many password-reset requests from this address. "
                                 f"Nothing was sent. Try again in {minutes} minute"
                                 f"{'s' if minutes != 1 else ''}, or ask your site "
                                 f"administrator.")
            response = self.render_to_response(self.get_context_data(form=form), status=429)
            response["Retry-After"] = str(minutes * 60)
            return response
        return super().post(request, *args, **kwargs)
