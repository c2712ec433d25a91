"""The inbox: every signed-in person's own notifications, newest first, marked read one by
one or all at once. Thin views over ``register.inbox.services``."""

from __future__ import annotations

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.paginator import Paginator
from django.http import Http404
from django.shortcuts import redirect, render
from django.urls import reverse
from django.utils.http import url_has_allowed_host_and_scheme
from django.views.decorators.http import require_GET, require_POST

from register.inbox import services
from register.models import Notification

PAGE_SIZE = 30


@login_required
@require_GET
def inbox(request):
    notes = services.inbox(request.user)
    unread_only = request.GET.get("show") == "unread"
    if unread_only:
        notes = notes.filter(read_at__isnull=True)
    page = Paginator(notes, PAGE_SIZE).get_page(request.GET.get("page"))
    return render(request, "register/inbox/inbox.html", {
        "page": page, "unread_only": unread_only,
        "unread": services.unread_count(request.user),
    })


def _back(request):
    target = request.POST.get("next", "")
    if target and url_has_allowed_host_and_scheme(target, allowed_hosts={request.get_host()},
                                                  require_https=request.is_secure()):
        return redirect(target)
    return redirect(reverse("inbox:list"))


@login_required
@require_POST
def read(request, pk):
    try:
        services.mark_read(request.user, pk)
    except Notification.DoesNotExist:
        raise Http404("No such notification.") from None
    return _back(request)


@login_required
@require_POST
def read_all(request):
    n = services.mark_all_read(request.user)
    messages.success(request, f"{n} notification{'s' if n != 1 else ''} marked read."
                     if n else "Nothing unread.")
    return _back(request)
