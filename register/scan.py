"""The periodic follow-up scan: test plans and bypasses, their state changes, notifications.

``scan(as_of)`` is the one entry point, used by the Celery beat task and the
``scan_plans`` command. It is idempotent: each notification has a unique
``(recipient, subject_key)`` where the subject key names the plan (or bypass), the
state and the due cycle, so a second run, or a run after a worker was killed mid-way,
creates nothing twice and still creates whatever the first run missed. Emails are
claimed row by row (``emailed_at``) before sending, so a notification is emailed at
most once; the in-app notification always exists.

``notify_verdict_changes(pairs)`` is called after a recompute: when a SIF's stored
verdict turns to "does not meet target" it tells the site's functional-safety leads,
once per change (the subject key names the assessment that made the change).
"""

from __future__ import annotations

import datetime as dt
from collections import Counter
from dataclasses import dataclass, field

from django.conf import settings
from django.core.mail import send_mail
from django.db import transaction
from django.db.models import F, Q
from django.urls import reverse
from django.utils import timezone

from . import choices, presenters
from .days import end_of_day
from .filters import not_decommissioned
from .models import Bypass, Membership, Notification, SafetyFunction, TestPlan
from .scheduling import PlanStatus, active_plans, refresh_plans

PlanState = choices.PlanState
ESCALATIONS = {PlanState.ESCALATED, PlanState.ESCALATED_2}
NOTIFY_STATES = {PlanState.DUE_SOON, PlanState.OVERDUE, *ESCALATIONS}
#: A bypass open longer than this multiple of its authorised duration is escalated.
BYPASS_ESCALATION_FACTOR = 2.0


@dataclass
class ScanResult:
    as_of: dt.date
    plans: dict[int, PlanStatus] = field(default_factory=dict)
    counts: Counter = field(default_factory=Counter)
    bypass_states: dict[int, str] = field(default_factory=dict)
    notifications_created: int = 0
    emails_sent: int = 0


def bypass_state(bypass: Bypass, at: dt.datetime) -> str:
    if bypass.ended_at is not None and bypass.ended_at <= at:
        return choices.BypassState.CLOSED
    hours = bypass.duration_hours(at)
    if hours > bypass.authorised_hours * BYPASS_ESCALATION_FACTOR:
        return choices.BypassState.ESCALATED
    if hours > bypass.authorised_hours:
        return choices.BypassState.OVERDUE
    return choices.BypassState.OPEN


def scan(as_of: dt.date | None = None, *, notify: bool = True) -> ScanResult:
    """Compute every plan's and open bypass's state as of a date; on today's scan, update
    the caches and create one notification per state change.

    A scan for a past date (``notify=False``) only reports: it writes nothing.
    """
    as_of = as_of or timezone.localdate()
    result = ScanResult(as_of=as_of)
    plans = active_plans()
    if notify:
        result.plans = refresh_plans(plans, as_of)
    else:
        from .scheduling import compute_statuses

        result.plans = compute_statuses(plans, as_of)
    result.counts = Counter(s.state for s in result.plans.values())

    at = end_of_day(as_of)
    if as_of == timezone.localdate():
        at = timezone.now()
    bypasses = list(Bypass.objects.filter(started_at__lte=at).exclude(ended_at__lt=at)
                    .select_related("sif__unit__site", "sif__owner", "authorised_by"))
    for b in bypasses:
        result.bypass_states[b.pk] = bypass_state(b, at)
    if not notify:
        return result

    changed = [b for b in bypasses if b.cached_state != result.bypass_states[b.pk]]
    for b in changed:
        b.cached_state = result.bypass_states[b.pk]
    if changed:
        Bypass.objects.bulk_update(changed, ["cached_state"])

    notes = _plan_notifications(result.plans) + _bypass_notifications(bypasses, result)
    with transaction.atomic():
        before = Notification.objects.count()
        Notification.objects.bulk_create(notes, ignore_conflicts=True, batch_size=1000)
        result.notifications_created = Notification.objects.count() - before
    result.emails_sent = send_pending_emails()
    return result


def _leads_by_site() -> dict[int, list]:
    out: dict[int, list] = {}
    for m in Membership.objects.filter(role=choices.Role.LEAD).select_related("user"):
        out.setdefault(m.site_id, []).append(m.user)
    return out


def _plan_notifications(statuses: dict[int, PlanStatus]) -> list[Notification]:
    wanted = {pid: s for pid, s in statuses.items() if s.state in NOTIFY_STATES}
    if not wanted:
        return []
    leads = _leads_by_site()
    notes = []
    for plan in TestPlan.objects.filter(pk__in=wanted).select_related(
            "sif__unit__site", "sif__owner", "assignee"):
        s = wanted[plan.pk]
        site = plan.sif.unit.site
        recipients = {u.pk: u for u in (plan.sif.owner, plan.assignee) if u}
        if s.state in ESCALATIONS:
            recipients.update({u.pk: u for u in leads.get(site.pk, [])})
        label = PlanState(s.state).label.lower()
        late = f", {s.days_overdue} days overdue" if s.days_overdue else ""
        message = (f"{plan.sif.tag} {plan.name}: {label} (due {s.due_on:%d %b %Y}{late}).")
        key = f"plan:{plan.pk}:{s.state}:{s.due_on.isoformat()}"
        link = reverse("register:sif_detail", args=[plan.sif_id])
        for user in recipients.values():
            notes.append(Notification(recipient=user, site=site,
                                      kind=choices.NotificationKind.PLAN_STATE,
                                      subject_key=key, message=message, link=link))
    return notes


def _bypass_notifications(bypasses, result: ScanResult) -> list[Notification]:
    leads = _leads_by_site()
    notes = []
    for b in bypasses:
        state = result.bypass_states[b.pk]
        if state not in (choices.BypassState.OVERDUE, choices.BypassState.ESCALATED):
            continue
        site = b.sif.unit.site
        recipients = {u.pk: u for u in (b.authorised_by, b.sif.owner) if u}
        if state == choices.BypassState.ESCALATED:
            recipients.update({u.pk: u for u in leads.get(site.pk, [])})
        hours = b.duration_hours(timezone.now())
        message = (f"{b.sif.tag} bypass open {hours:.0f} h, authorised for "
                   f"{b.authorised_hours:g} h: {choices.BypassState(state).label.lower()}.")
        key = f"bypass:{b.pk}:{state}"
        link = reverse("register:sif_detail", args=[b.sif_id])
        for user in recipients.values():
            notes.append(Notification(recipient=user, site=site,
                                      kind=choices.NotificationKind.BYPASS_STATE,
                                      subject_key=key, message=message, link=link))
    return notes


def verdict_turned_to_fail(previous, new) -> bool:
    """The one rule of a target notification: the new assessment does not meet the target
    and the previous one of that SIF (if any) did meet it or was not shown to."""
    return new is not None and new.meets_target is False and (
        previous is None or previous.meets_target is not False)


def notify_verdict_changes(pairs) -> int:
    """Notify the functional-safety leads of each SIF whose verdict has just turned to
    "does not meet target".

    ``pairs``: ``(previous_assessment_or_None, new_assessment)`` for the SIFs just
    recomputed (new assessments already stored). One notification per lead per change:
    the subject key is ``target:<sif>:<new assessment>``, so calling again with the same
    pairs, or a later recompute with the same verdict, creates nothing; meeting the target
    again and then failing creates a new one. Decommissioned SIFs are left out (as on the
    plant overview). The message names the SIF and the failed
    criteria (the verdict's summary). The next scan emails it (``send_pending_emails``).
    Returns the number of notifications created; four queries whatever the number of SIFs.
    """
    changed = [new for previous, new in pairs if verdict_turned_to_fail(previous, new)]
    if not changed:
        return 0
    sifs = not_decommissioned(SafetyFunction.objects.select_related("unit__site")).in_bulk(
        {a.sif_id for a in changed})
    site_ids = {s.unit.site_id for s in sifs.values()}
    leads: dict[int, list] = {}
    for m in Membership.objects.filter(role=choices.Role.LEAD,
                                       site_id__in=site_ids).select_related("user"):
        leads.setdefault(m.site_id, []).append(m.user)
    notes = []
    for a in changed:
        sif = sifs.get(a.sif_id)
        if sif is None:  # decommissioned: protects nothing any more
            continue
        key = f"target:{sif.pk}:{a.pk or a.computed_at.isoformat()}"
        message = f"{sif.tag} ({sif.name}): {presenters.verdict_summary(a)}"
        link = reverse("register:sif_detail", args=[sif.pk]) + "#figures"
        for user in leads.get(sif.unit.site_id, []):
            notes.append(Notification(recipient=user, site=sif.unit.site,
                                      kind=choices.NotificationKind.TARGET, subject_key=key,
                                      message=message, link=link))
    if not notes:
        return 0
    existing = set(Notification.objects.filter(
        subject_key__in={n.subject_key for n in notes}).values_list("recipient_id",
                                                                   "subject_key"))
    new_notes = [n for n in notes if (n.recipient.pk, n.subject_key) not in existing]
    Notification.objects.bulk_create(new_notes, ignore_conflicts=True)
    return len(new_notes)


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
