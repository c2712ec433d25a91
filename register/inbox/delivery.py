"""E-mail delivery of notifications: each notification is e-mailed until the mail server
accepts it, at most once, never marked sent before that."""

from __future__ import annotations

import datetime as dt

from django.conf import settings
from django.core.mail import send_mail
from django.db.models import F, Q
from django.utils import timezone

from register.models import Notification

#: A claim older than this is taken as abandoned (a worker died mid-send).
EMAIL_LEASE = dt.timedelta(minutes=10)
#: Attempts after which a notification is no longer e-mailed (it stays on its page).
EMAIL_MAX_ATTEMPTS = 10
SUBJECT_LENGTH = 78


def email_subject(message: str) -> str:
    """A subject cut at a word boundary, never mid-phrase, marked when shortened."""
    text = " ".join(message.split())
    prefix = "[SIF Ledger] "
    room = SUBJECT_LENGTH - len(prefix)
    if len(text) <= room:
        return prefix + text
    cut = text[:room - 1].rsplit(" ", 1)[0].rstrip(",;:")
    return prefix + cut + "…"


def email_body(note: Notification) -> str:
    link = f"{settings.SITE_URL}{note.link}" if note.link else settings.SITE_URL + "/"
    return (f"{note.message}\n\nOpen: {link}\n\n"
            "SIF Ledger results support, and do not replace, a functional safety assessment "
            "by competent persons under IEC 61511 and local regulations.\n")


def send_pending_emails(limit: int = 500) -> int:
    """E-mail notifications not yet accepted by the mail server; returns how many were.

    Each row is claimed first by a conditional update (a lease of EMAIL_LEASE), so two
    workers never send the same one; ``emailed_at`` is set only once the server accepted
    the message. A failed attempt is recorded (``email_error``, ``email_attempts``) and
    released, so the next run tries again, up to EMAIL_MAX_ATTEMPTS.
    """
    sent = 0
    now = timezone.now()
    pending = list(Notification.objects.filter(
        emailed_at__isnull=True, email_attempts__lt=EMAIL_MAX_ATTEMPTS,
        recipient__email__gt="").filter(
        Q(email_claimed_at__isnull=True) | Q(email_claimed_at__lt=now - EMAIL_LEASE))
        .select_related("recipient").order_by("id")[:limit])
    for note in pending:
        claimed = Notification.objects.filter(pk=note.pk, emailed_at__isnull=True).filter(
            Q(email_claimed_at__isnull=True) | Q(email_claimed_at__lt=now - EMAIL_LEASE)
        ).update(email_claimed_at=timezone.now())
        if not claimed:
            continue
        try:
            send_mail(subject=email_subject(note.message), message=email_body(note),
                      from_email=settings.DEFAULT_FROM_EMAIL,
                      recipient_list=[note.recipient.email], fail_silently=False)
        except Exception as exc:
            Notification.objects.filter(pk=note.pk).update(
                email_claimed_at=None, email_attempts=F("email_attempts") + 1,
                email_error=f"{type(exc).__name__}: {exc}"[:300])
            continue
        Notification.objects.filter(pk=note.pk).update(
            emailed_at=timezone.now(), email_attempts=F("email_attempts") + 1, email_error="")
        sent += 1
    return sent
