"""Notifications to people, created once per change.

Every notification has a subject key naming what changed and in which cycle; a
notification is unique per (recipient, subject key), so calling any function here again
for the same change creates nothing. Each new notification is e-mailed by its own task
once the transaction that created it commits (``register.inbox.delivery``).

- ``notify_verdict_changes``: a recompute's verdict changes, written as
  ``SifVerdictChange`` rows; the leads hear of a SIF that no longer meets its target.
- ``notify_plan_changes``: test plan state changes (``PlanStateChange`` rows, written by
  ``register.schedule.scan.record_transitions``): due soon, overdue, escalated.
- ``notify_bypasses``: a bypass open past its authorised time, or far past it.
- ``deferral_requested``, ``deferral_decided``, ``deferral_withdrawn``, ``failure_found``,
  ``waiting_for_countersignature``: called by the services that make those changes.
"""

from __future__ import annotations

from django.db import connection, transaction
from django.db.models.constants import OnConflict
from django.db.models.sql import InsertQuery
from django.urls import reverse

from register import choices, presenters
from register.models import (
    Membership,
    Notification,
    SafetyFunction,
    TestPlan,
    not_decommissioned,
)
from register.models.notifications import PlanStateChange, SifVerdictChange

Kind = choices.NotificationKind
PlanState = choices.PlanState

#: The plan states that are announced, and the kind of each announcement.
PLAN_STATE_KIND = {
    PlanState.DUE_SOON: Kind.DUE_SOON,
    PlanState.OVERDUE: Kind.OVERDUE,
    PlanState.ESCALATED: Kind.ESCALATED,
    PlanState.ESCALATED_2: Kind.ESCALATED_2,
}
ESCALATIONS = {PlanState.ESCALATED, PlanState.ESCALATED_2}
DANGEROUS = (choices.FailureMode.DANGEROUS_UNDETECTED, choices.FailureMode.DANGEROUS_DETECTED)


# ---------------------------------------------------------------------------------------
# Creating notifications (the one writer)
# ---------------------------------------------------------------------------------------


def members(site_ids, role: str) -> dict[int, list]:
    """The users holding ``role`` at each of ``site_ids`` (one query)."""
    out: dict[int, list] = {}
    for m in Membership.objects.filter(role=role, site_id__in=set(site_ids)).select_related(
            "user").order_by("site_id", "user_id"):
        if m.user.is_active:
            out.setdefault(m.site_id, []).append(m.user)
    return out


def publish(notes: list[Notification]) -> list[int]:
    """Store the notifications not stored yet (unique per recipient and subject key) and
    e-mail each new one after the commit. Returns the ids of the new ones. On PostgreSQL
    one statement per thousand (an insert that skips the stored ones and returns the new
    ones), elsewhere three queries whatever the number."""
    seen = set()
    unique = []
    for n in notes:
        if (n.recipient_id, n.subject_key) not in seen:
            seen.add((n.recipient_id, n.subject_key))
            unique.append(n)
    if not unique:
        return []
    if connection.vendor == "postgresql":
        ids = [pk for i in range(0, len(unique), 1000)
               for pk in _insert_new(unique[i:i + 1000])]
    else:
        ids = _store_new(unique)
    if ids:
        from register.inbox.delivery import enqueue_emails

        transaction.on_commit(lambda: enqueue_emails(ids))
    return ids


def _insert_new(notes: list[Notification]) -> list[int]:
    """``INSERT ... ON CONFLICT DO NOTHING RETURNING id``: the ids of the rows this
    statement stored (a notification stored before, or by a concurrent transaction that
    commits first, is skipped by the unique constraint)."""
    opts = Notification._meta
    query = InsertQuery(Notification, on_conflict=OnConflict.IGNORE)
    query.insert_values([f for f in opts.local_concrete_fields if not f.primary_key], notes)
    compiler = query.get_compiler(connection=connection)
    compiler.returning_fields = [opts.pk]
    ((sql, params),) = compiler.as_sql()
    with connection.cursor() as cursor:
        cursor.execute(sql, params)
        return [pk for (pk,) in cursor.fetchall()]


def _store_new(unique: list[Notification]) -> list[int]:
    """``publish``'s store on other databases: read the stored keys, insert the others,
    read their ids (three queries)."""
    keys = {n.subject_key for n in unique}
    existing = set(Notification.objects.filter(subject_key__in=keys).values_list(
        "recipient_id", "subject_key"))
    fresh = [n for n in unique if (n.recipient_id, n.subject_key) not in existing]
    if not fresh:
        return []
    Notification.objects.bulk_create(fresh, ignore_conflicts=True, batch_size=1000)
    wanted = {(n.recipient_id, n.subject_key) for n in fresh}
    return [pk for pk, user, key in Notification.objects.filter(
        subject_key__in={k for _, k in wanted}, emailed_at__isnull=True).values_list(
        "pk", "recipient_id", "subject_key") if (user, key) in wanted]


def _note(user, site, kind, key, subject, message, link) -> Notification:
    """``subject``: a headline short enough to be a whole e-mail subject."""
    return Notification(recipient=user, site=site, kind=kind, subject_key=key,
                        subject=subject[:200], message=message, link=link)


# ---------------------------------------------------------------------------------------
# Verdict changes (called by the calculations' adapter after a recompute)
# ---------------------------------------------------------------------------------------


def verdict_turned_to_fail(previous, new) -> bool:
    """The one rule of a target notification: the new assessment does not meet the target
    and the previous one of that SIF (if any) did meet it or was not shown to."""
    return new is not None and new.meets_target is False and (
        previous is None or previous.meets_target is not False)


def notify_verdict_changes(pairs) -> int:
    """Record each SIF whose verdict changed and notify the site's functional-safety leads
    of each SIF whose verdict has just turned to "does not meet target".

    ``pairs``: ``(previous_assessment_or_None, new_assessment)`` for the SIFs just
    recomputed (new assessments already stored). A change of ``meets_target`` is written
    as one ``SifVerdictChange`` row (unique per SIF and new assessment); a turn to "does
    not meet" is notified from that row, once per lead: the subject key is
    ``target:<sif>:<new assessment>``, so calling again with the same pairs, or a later
    recompute with the same verdict, creates nothing; meeting the target again and then
    failing creates a new one. Decommissioned SIFs are left out (as on the plant
    overview). The message names the SIF and the failed criteria (the verdict's summary).
    Returns the number of notifications created; a fixed number of queries whatever the
    number of SIFs.
    """
    changed = [(p, n) for p, n in pairs if n is not None and n.pk is not None and (
        (p.meets_target if p is not None else None) != n.meets_target)]
    if not changed:
        return 0
    sifs = not_decommissioned(SafetyFunction.objects.select_related("unit__site")).in_bulk(
        {n.sif_id for _, n in changed})
    rows = [SifVerdictChange(sif_id=n.sif_id, assessment_id=n.pk,
                             previous_assessment_id=p.pk if p is not None else None,
                             from_meets=p.meets_target if p is not None else None,
                             to_meets=n.meets_target, at=n.computed_at,
                             summary=presenters.verdict_summary(n)[:500])
            for p, n in changed if n.sif_id in sifs]
    SifVerdictChange.objects.bulk_create(rows, ignore_conflicts=True)
    failing = [r for r in rows if r.to_meets is False and r.from_meets is not False]
    if not failing:
        return 0
    leads = members({sifs[r.sif_id].unit.site_id for r in failing}, choices.Role.LEAD)
    notes = []
    for r in failing:
        sif = sifs[r.sif_id]
        key = f"target:{sif.pk}:{r.assessment_id}"
        message = f"{sif.tag} ({sif.name}): {r.summary}"
        link = reverse("register:sif_detail", args=[sif.pk]) + "#figures"
        subject = f"{sif.tag} no longer meets its target"
        notes += [_note(u, sif.unit.site, Kind.TARGET, key, subject, message, link)
                  for u in leads.get(sif.unit.site_id, [])]
    return len(publish(notes))


# ---------------------------------------------------------------------------------------
# Test plan state changes (from PlanStateChange rows) and bypasses
# ---------------------------------------------------------------------------------------


def plan_subject_key(plan_id: int, state: str, due_on) -> str:
    return f"plan:{plan_id}:{state}:{due_on.isoformat() if due_on else '-'}"


def notify_plan_changes(changes: list[PlanStateChange]) -> int:
    """Notify each change into an announced state (due soon, overdue, escalated) to the
    SIF's owner and the plan's assignee, and an escalation also to the site's leads. One
    notification per recipient and change (subject key ``plan:<plan>:<state>:<due>``).
    A fixed number of queries whatever the number of changes."""
    wanted = [c for c in changes if c.to_state in PLAN_STATE_KIND]
    if not wanted:
        return 0
    plans = TestPlan.objects.select_related("sif__unit__site", "sif__owner", "assignee"
                                            ).in_bulk({c.plan_id for c in wanted})
    leads = members({p.sif.unit.site_id for p in plans.values()}, choices.Role.LEAD)
    notes = []
    for c in wanted:
        plan = plans[c.plan_id]
        site = plan.sif.unit.site
        recipients = {u.pk: u for u in (plan.sif.owner, plan.assignee) if u and u.is_active}
        if c.to_state in ESCALATIONS:
            recipients.update({u.pk: u for u in leads.get(site.pk, [])})
        message = f"{plan.sif.tag} {plan.name}: {plan_state_phrase(c)}"
        link = reverse("register:sif_detail", args=[plan.sif_id]) + "#plans"
        key = plan_subject_key(plan.pk, c.to_state, c.due_on)
        subject = f"{plan.sif.tag} {plan.name}: {PlanState(c.to_state).label.lower()}"
        notes += [_note(u, site, PLAN_STATE_KIND[c.to_state], key, subject, message, link)
                  for u in recipients.values()]
    return len(publish(notes))


def plan_state_phrase(change: PlanStateChange) -> str:
    label = PlanState(change.to_state).label.lower()
    due = f"due {change.due_on:%d %b %Y}" if change.due_on else "no due date"
    return f"{label} ({due})."


def notify_bypasses(changed: list, states: dict[int, str], at) -> int:
    """Notify each bypass that has just run past its authorised time (to whoever asked
    for it, whoever authorised it and the SIF's owner) or far past it (also to the site's
    leads); subject
    key ``bypass:<bypass>:<state>``."""
    wanted = [b for b in changed if states[b.pk] in (choices.BypassState.OVERDUE,
                                                      choices.BypassState.ESCALATED)]
    if not wanted:
        return 0
    leads = members({b.sif.unit.site_id for b in wanted}, choices.Role.LEAD)
    notes = []
    for b in wanted:
        state = states[b.pk]
        site = b.sif.unit.site
        recipients = {u.pk: u for u in (b.requested_by, b.authorised_by, b.sif.owner)
                      if u and u.is_active}
        if state == choices.BypassState.ESCALATED:
            recipients.update({u.pk: u for u in leads.get(site.pk, [])})
        message = (f"{b.sif.tag} bypass open {b.duration_hours(at):.0f} h, authorised for "
                   f"{b.authorised_hours:g} h: {choices.BypassState(state).label.lower()}.")
        link = reverse("register:sif_detail", args=[b.sif_id]) + "#bypasses"
        subject = f"{b.sif.tag} bypass {choices.BypassState(state).label.lower()}"
        notes += [_note(u, site, Kind.BYPASS_STATE, f"bypass:{b.pk}:{state}", subject,
                        message, link)
                  for u in recipients.values()]
    return len(publish(notes))


# ---------------------------------------------------------------------------------------
# Records and deferrals (called by their services)
# ---------------------------------------------------------------------------------------


def _site_of_record(record):
    return record.sif.unit.site


def failure_found(record) -> int:
    """A signed record found a dangerous failure: tell the site's leads, once per record
    (subject key ``failure:<record>``). Nothing for a draft or a record without one."""
    if not record.is_signed:
        return 0
    failed = sorted((r for r in record.results_with_components()  # read once per signing
                     if r.failure_mode in DANGEROUS), key=lambda r: r.component.tag)
    if not failed:
        return 0
    site = _site_of_record(record)
    tags = ", ".join(r.component.tag for r in failed)
    message = (f"{record.sif.tag}: dangerous failure found in a "
               f"{record.get_kind_display().lower()} on {record.performed_at:%d %b %Y} "
               f"({tags}).")
    link = reverse("register:test_detail", args=[record.pk])
    subject = f"{record.sif.tag}: dangerous failure found"
    notes = [_note(u, site, Kind.FAILURE_FOUND, f"failure:{record.pk}", subject, message,
                   link)
             for u in members([site.pk], choices.Role.LEAD).get(site.pk, [])]
    return len(publish(notes))


def waiting_for_countersignature(record) -> int:
    """A record was signed and awaits a verifier: tell the site's verifiers (never the
    performer), once per record (subject key ``countersign:<record>``)."""
    if record.status != choices.RecordStatus.SIGNED:
        return 0
    site = _site_of_record(record)
    message = (f"{record.sif.tag}: {record.get_kind_display().lower()} of "
               f"{record.performed_at:%d %b %Y} signed, waiting for countersignature.")
    link = reverse("field:record_detail", args=[record.pk])  # with the countersign form
    subject = f"{record.sif.tag}: test record waiting for countersignature"
    notes = [_note(u, site, Kind.COUNTERSIGN, f"countersign:{record.pk}", subject, message,
                   link)
             for u in members([site.pk], choices.Role.VERIFIER).get(site.pk, [])
             if u.pk != record.performed_by_id]
    return len(publish(notes))


def bypass_requested(bypass) -> int:
    """A bypass was put in place and awaits authorisation: tell the site's leads (not the
    requester, who may not authorise it), once (subject key ``bypass:<bypass>:requested``)."""
    site = bypass.sif.unit.site
    what = f"{bypass.component.tag} of {bypass.sif.tag}" if bypass.component_id \
        else bypass.sif.tag
    message = (f"{what} bypassed since {bypass.started_at:%d %b %Y %H:%M} for an expected "
               f"{bypass.authorised_hours:g} h ({bypass.reason}), awaiting your "
               "authorisation.")
    link = reverse("operations:bypass", args=[bypass.pk])
    subject = f"{bypass.sif.tag}: bypass awaiting authorisation"
    notes = [_note(u, site, Kind.BYPASS_REQUESTED, f"bypass:{bypass.pk}:requested", subject,
                   message, link)
             for u in members([site.pk], choices.Role.LEAD).get(site.pk, [])
             if u.pk != bypass.requested_by_id]
    return len(publish(notes))


def _deferral_link(deferral) -> str:
    return reverse("deferrals:list") + f"#deferral-{deferral.pk}"


def _deferral_subject(deferral, what: str) -> str:
    return f"{deferral.plan.sif.tag} {deferral.plan.name}: deferral {what}"


def _deferral_text(deferral) -> str:
    plan = deferral.plan
    return (f"{plan.sif.tag} {plan.name}: deferral of the test due {deferral.due_on:%d %b %Y} "
            f"to {deferral.proposed_on:%d %b %Y}")


def deferral_requested(deferral) -> int:
    """A deferral awaits a decision: tell the site's leads (not the requester), once
    (subject key ``deferral:<deferral>:requested``)."""
    site = deferral.plan.sif.unit.site
    message = f"{_deferral_text(deferral)} requested, awaiting your decision."
    link = reverse("deferrals:decide", args=[deferral.pk])
    notes = [_note(u, site, Kind.DEFERRAL_REQUESTED, f"deferral:{deferral.pk}:requested",
                   _deferral_subject(deferral, "requested"), message, link)
             for u in members([site.pk], choices.Role.LEAD).get(site.pk, [])
             if u.pk != deferral.requested_by_id]
    return len(publish(notes))


def deferral_decided(deferral) -> int:
    """A deferral was approved or rejected: tell the requester, once per decision
    (subject key ``deferral:<deferral>:<status>``)."""
    if deferral.status == choices.DeferralStatus.PENDING:
        return 0
    site = deferral.plan.sif.unit.site
    decision = choices.DeferralStatus(deferral.status).label.lower()
    note = f": {deferral.decision_note.strip()}" if deferral.decision_note.strip() else "."
    message = f"{_deferral_text(deferral)} {decision}{note}"
    return len(publish([_note(deferral.requested_by, site, Kind.DEFERRAL,
                              f"deferral:{deferral.pk}:{deferral.status}",
                              _deferral_subject(deferral, decision), message,
                              _deferral_link(deferral))]))


def deferral_withdrawn(deferral) -> int:
    """A deferral was withdrawn: tell the requester, once (subject key
    ``deferral:<deferral>:withdrawn``)."""
    site = deferral.plan.sif.unit.site
    message = f"{_deferral_text(deferral)} withdrawn."
    return len(publish([_note(deferral.requested_by, site, Kind.DEFERRAL_WITHDRAWN,
                              f"deferral:{deferral.pk}:withdrawn",
                              _deferral_subject(deferral, "withdrawn"), message,
                              _deferral_link(deferral))]))
