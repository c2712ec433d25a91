"""Token authentication with a lifetime: an unknown, revoked or expired token is answered
401 with a message saying which and how to get a new one (``POST /api/token/``)."""

from __future__ import annotations

from django.utils import timezone
from rest_framework.authentication import TokenAuthentication
from rest_framework.authtoken.models import Token
from rest_framework.exceptions import AuthenticationFailed

from register.accounts import tokens

NEW_TOKEN = "Ask for a new one with POST /api/token/ (user name and password)."


class ExpiringTokenAuthentication(TokenAuthentication):
    model = Token

    def authenticate_credentials(self, key):
        token = Token.objects.select_related("user").filter(key=key).first()
        if token is None:
            raise AuthenticationFailed(
                "Invalid token: it is unknown or was revoked (a password change revokes the "
                f"user's tokens). {NEW_TOKEN}")
        if not token.user.is_active:
            raise AuthenticationFailed("The token's user is inactive or deleted.")
        if tokens.is_expired(token):
            ended = timezone.localtime(tokens.expires_at(token))
            raise AuthenticationFailed(
                f"Token expired at {ended:%Y-%m-%d %H:%M} {ended.tzname()} (a token lasts "
                f"{tokens.lifetime().days} days). {NEW_TOKEN}")
        return token.user, token
