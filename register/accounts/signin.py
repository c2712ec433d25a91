"""What a locked-out sign-in is told.

django-axes counts failed sign-ins per user name and address in the database (settings:
``AXES_*``) and calls :func:`locked_out` for the response once a pair is locked: the web
sign-in page gets an HTML page, the API (``/api/``) and requests asking for JSON get a JSON
body, both with status 429, a ``Retry-After`` header and the time the lock ends.
"""

from __future__ import annotations

import datetime as dt
import math

from axes.helpers import get_client_username, get_cool_off, get_failure_limit
from axes.models import AccessAttempt
from django.conf import settings
from django.db.models import Max
from django.http import JsonResponse
from django.shortcuts import render
from django.utils import timezone


def client_address(request) -> str:
    """The client's address: ``REMOTE_ADDR``, or, when that is a proxy named in
    ``TRUSTED_PROXIES`` (which sets X-Forwarded-For itself), the last address it
    forwarded. Used by the sign-in lock and the password-reset limit."""
    remote = request.META.get("REMOTE_ADDR", "")
    if remote in settings.TRUSTED_PROXIES:
        forwarded = request.META.get("HTTP_X_FORWARDED_FOR", "").split(",")[-1].strip()
        if forwarded:
            return forwarded
    return remote


def lock_ends(request, credentials=None) -> dt.datetime:
    """When the lock on this request's user name and address ends: the cool-off after the
    last failure counted against the pair."""
    username = get_client_username(request, credentials)
    address = getattr(request, "axes_ip_address", None)
    last = (AccessAttempt.objects.filter(username=username, ip_address=address)
            .aggregate(last=Max("attempt_time"))["last"])
    return (last or timezone.now()) + get_cool_off(request)


def lock_message(username: str, limit: int, until: dt.datetime) -> str:
    local = timezone.localtime(until)
    return (f"Too many failed sign-in attempts: after {limit} failures, signing in as "
            f"\u201c{username}\u201d from this address is locked until {local:%H:%M} "
            f"{local.tzname()} ({local:%Y-%m-%d}). Try again after that time, or ask your "
            f"site administrator to unlock it. Nothing else was changed.")


def _wants_json(request) -> bool:
    return (request.path.startswith("/api/")
            or "application/json" in request.META.get("HTTP_ACCEPT", "")
            or request.META.get("HTTP_X_REQUESTED_WITH") == "XMLHttpRequest")


def locked_out(request, original_response=None, credentials=None):
    """The response to a sign-in refused because its user name and address are locked
    (``AXES_LOCKOUT_CALLABLE``)."""
    username = get_client_username(request, credentials) or ""
    limit = get_failure_limit(request, credentials)
    until = lock_ends(request, credentials)
    seconds = max(1, math.ceil((until - timezone.now()).total_seconds()))
    message = lock_message(username, limit, until)
    status = settings.AXES_HTTP_RESPONSE_CODE
    if _wants_json(request):
        response = JsonResponse({"detail": message, "locked_until": until.isoformat(),
                                 "retry_after_seconds": seconds}, status=status)
    else:
        response = render(request, "registration/locked_out.html", {
            "message": message, "until": until, "minutes": math.ceil(seconds / 60),
            "username": username}, status=status)
    response["Retry-After"] = str(seconds)
    return response
