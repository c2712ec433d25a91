"""Notifications that follow from the calculations: a SIF whose verdict has just turned to
"does not meet target" is announced to the site's functional-safety leads, once per change
(the subject key names the assessment that made the change)."""

from __future__ import annotations

from django.urls import reverse

from register import choices, presenters
from register.models import Membership, Notification, SafetyFunction, not_decommissioned


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
