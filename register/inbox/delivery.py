"""E-mail delivery of notifications: each notification is e-mailed by its own task until
the mail server accepts it, never marked sent before that, and never sent twice while
another sender holds it.

A new notification is handed to ``register.send_notification_email`` when the
transaction that created it commits (``enqueue_emails``). That task sends one e-mail
(``send_one``) and, when the server refuses or cannot be reached, retries with
exponential backoff (``retry_delay``). ``send_pending_emails`` is the sweeper, run by the
scan: it sends whatever is still unsent long after its creation (a task lost with a
broker or a worker).

Each send first claims the row by a conditional update (a lease of ``EMAIL_LEASE``), so
two senders never send the same notification; ``emailed_at`` is set only once the server
accepted the message. A sender killed between the server's acceptance and that update
leaves the lease to expire and the message is sent again: delivery is at most once
while senders live, at least once when one dies at that instant.
"""

from __future__ import annotations

import datetime as dt
import logging
import re

from django.conf import settings
from django.core.mail import send_mail
from django.db.models import F, Q
from django.utils import timezone

from register.models import Notification
from register.presenters import CAUTION as PRESENTED_CAUTION

log = logging.getLogger(__name__)

#: A claim older than this is taken as abandoned (a sender died mid-send).
EMAIL_LEASE = dt.timedelta(minutes=10)
#: Attempts after which a notification is no longer e-mailed (it stays in the inbox).
EMAIL_MAX_ATTEMPTS = 12
#: Backoff of the e-mail task: the n-th retry waits BASE x 2**n seconds, at most MAX.
EMAIL_BACKOFF_BASE_SECONDS = 2
EMAIL_BACKOFF_MAX_SECONDS = 3600
#: The sweeper leaves a notification this long to its own task before sending it itself.
SWEEP_AFTER = dt.timedelta(minutes=30)
SUBJECT_LENGTH = 78

CAUTION = f"SIF Ledger: {PRESENTED_CAUTION}"


class EmailNotSent(Exception):
    """The mail server did not accept the message (it will be retried)."""


def email_subject(text: str) -> str:
    """The e-mail subject of a headline or message: whole phrases only, never cut inside
    one. Short enough: all of it. Longer: the phrases (split after ``:;,.`` and before a
    parenthesis) that fit in SUBJECT_LENGTH, the first always whole, marked with "…"."""
    text = " ".join(text.split())
    prefix = "[SIF Ledger] "
    if len(prefix) + len(text) <= SUBJECT_LENGTH:
        return prefix + text
    phrases = re.split(r"(?<=[:;,.])\s+|\s+(?=\()", text)
    out, used = phrases[0], 1
    for phrase in phrases[1:]:
        if len(prefix) + len(out) + 1 + len(phrase) + 1 > SUBJECT_LENGTH:
            break
        out, used = f"{out} {phrase}", used + 1
    if used == len(phrases):
        return prefix + out
    return prefix + out.rstrip(",;:.") + "…"


def absolute_link(note: Notification) -> str:
    return f"{settings.SITE_URL}{note.link}" if note.link else settings.SITE_URL + "/"


def email_body(note: Notification) -> str:
    return (f"{note.message}\n\nOpen: {absolute_link(note)}\n"
            f"Your notifications: {settings.SITE_URL}/inbox/\n\n{CAUTION}\n")


def retry_delay(retries: int) -> int:
    """Seconds before the next attempt after ``retries`` failed retries."""
    return min(EMAIL_BACKOFF_BASE_SECONDS * 2 ** retries, EMAIL_BACKOFF_MAX_SECONDS)


def enqueue_emails(note_ids) -> None:
    """Hand each notification to its own e-mail task (after the commit that created it)."""
    from register.inbox.tasks import send_notification_email

    for pk in note_ids:
        try:
            send_notification_email.delay(pk)
        except Exception:  # broker down: the sweeper sends it later
            log.exception("could not queue the e-mail of notification %s", pk)


def _claimable(now):
    return Q(email_claimed_at__isnull=True) | Q(email_claimed_at__lt=now - EMAIL_LEASE)


def send_one(note_id: int) -> bool:
    """E-mail one notification if it is still unsent and no other sender holds it.

    Returns True when the server accepted it now, False when there was nothing to do
    (already sent, held by another sender, given up, or no address). Raises
    ``EmailNotSent`` when the server did not accept it (the attempt is recorded and the
    claim released, so a retry may try again).
    """
    now = timezone.now()
    claimed = Notification.objects.filter(
        pk=note_id, emailed_at__isnull=True, email_attempts__lt=EMAIL_MAX_ATTEMPTS,
        recipient__email__gt="").filter(_claimable(now)).update(email_claimed_at=now)
    if not claimed:
        return False
    note = Notification.objects.select_related("recipient").get(pk=note_id)
    try:
        send_mail(subject=email_subject(note.subject or note.message),
                  message=email_body(note),
                  from_email=settings.DEFAULT_FROM_EMAIL,
                  recipient_list=[note.recipient.email], fail_silently=False)
    except Exception as exc:
        Notification.objects.filter(pk=note_id, email_claimed_at=now).update(
            email_claimed_at=None, email_attempts=F("email_attempts") + 1,
            email_error=f"{type(exc).__name__}: {exc}"[:300])
        raise EmailNotSent(f"notification {note_id}: {type(exc).__name__}: {exc}") from exc
    Notification.objects.filter(pk=note_id).update(
        emailed_at=timezone.now(), email_claimed_at=None,
        email_attempts=F("email_attempts") + 1, email_error="")
    return True


def attempts_left(note_id: int) -> bool:
    return Notification.objects.filter(pk=note_id, emailed_at__isnull=True,
                                       email_attempts__lt=EMAIL_MAX_ATTEMPTS).exists()


def send_pending_emails(limit: int = 500, *, older_than: dt.timedelta = SWEEP_AFTER) -> int:
    """The sweeper: e-mail notifications still unsent ``older_than`` after they were
    created (their own task was lost), up to EMAIL_MAX_ATTEMPTS attempts each; returns
    how many the server accepted. Claims as ``send_one`` does, so it never races a task."""
    now = timezone.now()
    ids = list(Notification.objects.filter(
        emailed_at__isnull=True, email_attempts__lt=EMAIL_MAX_ATTEMPTS,
        recipient__email__gt="", created_at__lte=now - older_than).filter(_claimable(now))
        .order_by("id").values_list("pk", flat=True)[:limit])
    sent = 0
    for pk in ids:
        try:
            sent += send_one(pk)
        except EmailNotSent:
            continue
    return sent
