import datetime as dt
import json

from django.core.management.base import BaseCommand
from django.utils import timezone

from register.choices import PlanState
from register.models import TestPlan
from register.schedule.scan import scan


class Command(BaseCommand):
    help = ("Run the due-date and bypass scan now. With --as-of, show the plant's state on "
            "another date (nothing is written or sent for a past or future date).")

    def add_arguments(self, parser):
        parser.add_argument("--as-of", type=dt.date.fromisoformat,
                            help="date to evaluate (YYYY-MM-DD); default today")
        parser.add_argument("--json", action="store_true",
                            help="print every test plan with its due date and state as JSON")

    def handle(self, *args, **opts):
        today = timezone.localdate()
        as_of = opts["as_of"] or today
        result = scan(as_of, notify=(as_of == today))
        if opts["json"]:
            plans = {p.pk: p for p in TestPlan.objects.filter(pk__in=result.plans)
                     .select_related("sif__unit")}
            rows = [{
                "plan_id": pid, "sif": plans[pid].sif.tag, "unit": plans[pid].sif.unit.code,
                "plan": plans[pid].name, "interval_months": plans[pid].interval_months,
                "due_on": s.due_on.isoformat() if s.due_on else None, "state": s.state,
                "days_overdue": s.days_overdue, "deferred": s.deferred,
            } for pid, s in sorted(result.plans.items(),
                                   key=lambda kv: (plans[kv[0]].sif.tag, kv[0]))]
            self.stdout.write(json.dumps({"as_of": as_of.isoformat(), "plans": rows,
                                          "bypasses": result.bypass_states}, indent=2))
            return
        c = result.counts
        self.stdout.write(
            f"As of {as_of}: {len(result.plans)} test plans: "
            + ", ".join(f"{c.get(s, 0)} {PlanState(s).label.lower()}" for s in (
                PlanState.ON_TRACK, PlanState.DUE_SOON, PlanState.OVERDUE,
                PlanState.ESCALATED, PlanState.ESCALATED_2)))
        open_b = sum(1 for s in result.bypass_states.values() if s != "closed")
        self.stdout.write(f"Open bypasses: {open_b} "
                          f"({sum(1 for s in result.bypass_states.values() if s != 'open' and s != 'closed')} "
                          "past their authorised time)")
        if as_of == today:
            self.stdout.write(f"Notifications created: {result.notifications_created}; "
                              f"emails sent: {result.emails_sent}")
