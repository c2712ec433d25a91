import datetime as dt
import json

from django.core.management.base import BaseCommand
from django.utils import timezone

from register.choices import PlanState
from register.models import TestPlan
from register.schedule.due import active_plans, live_statuses
from register.schedule.scan import scan


class Command(BaseCommand):
    help = ("Run the due-date and bypass scan now (each site on its own calendar). With "
            "--as-of, show the plant's state on another date (nothing is written or sent "
            "for a date other than today).")

    def add_arguments(self, parser):
        parser.add_argument("--as-of", type=dt.date.fromisoformat,
                            help="date to evaluate (YYYY-MM-DD); default today")
        parser.add_argument("--json", action="store_true",
                            help="print every test plan with its due date and state as JSON")

    def handle(self, *args, **opts):
        as_of = opts["as_of"]
        notify = as_of is None or as_of == timezone.localdate()
        result = scan(as_of if as_of != timezone.localdate() else None, notify=notify)
        shown = as_of or timezone.localdate()
        if opts["json"]:
            # every followed plan: the scan itself looked only at those whose state turned
            statuses = live_statuses(active_plans()) if notify else result.plans
            plans = {p.pk: p for p in TestPlan.objects.filter(pk__in=statuses)
                     .select_related("sif__unit")}
            rows = [{
                "plan_id": pid, "sif": plans[pid].sif.tag, "unit": plans[pid].sif.unit.code,
                "plan": plans[pid].name, "interval_months": plans[pid].interval_months,
                "due_on": s.due_on.isoformat() if s.due_on else None, "state": s.state,
                "days_overdue": s.days_overdue, "deferred": s.deferred,
            } for pid, s in sorted(statuses.items(),
                                   key=lambda kv: (plans[kv[0]].sif.tag, kv[0]))]
            self.stdout.write(json.dumps({"as_of": shown.isoformat(), "plans": rows,
                                          "bypasses": result.bypass_states}, indent=2))
            return
        c = result.counts
        self.stdout.write(
            f"As of {shown}: {sum(c.values())} test plans: "
            + "; ".join(f"{c.get(s, 0)} {PlanState(s).label.lower()}" for s in (
                PlanState.ON_TRACK, PlanState.DUE_SOON, PlanState.OVERDUE,
                PlanState.ESCALATED, PlanState.ESCALATED_2)))
        states = result.bypass_states.values()
        self.stdout.write(f"Open bypasses: {sum(1 for s in states if s != 'closed')} "
                          f"({sum(1 for s in states if s not in ('open', 'closed'))} "
                          "past their authorised time)")
        if notify:
            self.stdout.write(f"Plans looked at: {len(result.plans)}; state changes: "
                              f"{result.transitions}; notifications created: "
                              f"{result.notifications_created}; e-mails sent by the sweep: "
                              f"{result.emails_sent}")
