"""Builds the invented demo plant from ``fixtures/demo_plant.json``.

Everything is laid relative to ``today`` so the demo always shows tests due soon,
overdue and escalated. The history is random but seeded by each SIF's tag, so the same
day gives the same plant. All writes go through ``register.services``, and every history
row is dated when its event happened (the design when it was recorded, a test when it
was performed, signed and countersigned, a demand or bypass when it occurred), so the
as-of view shows the plant as it stood years ago.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import math
import random
from collections.abc import Callable
from pathlib import Path

from django.conf import settings
from django.contrib.auth import get_user_model
from django.contrib.auth.hashers import make_password
from django.db import transaction
from django.utils import timezone

from register import changes, choices, services
from register.calculations import calculations
from register.models import (
    Component,
    ConditionalModifier,
    Demand,
    DeviceType,
    HazardScenario,
    InitiatingCause,
    Membership,
    PlantUnit,
    ProtectionLayer,
    SafetyFunction,
    Site,
    Subsystem,
    TestPlan,
    TestStep,
)
from register.schedule import followup
from register.schedule import services as schedule_services
from register.schedule.due import add_months, due_date, refresh_plans

DEMO_FILE = Path(settings.BASE_DIR) / "fixtures" / "demo_plant.json"
DEMO_PASSWORD = "demo-pass-2026"
#: The change request under which the demo plant's design rows are recorded.
DEMO_REFERENCE = "CR-DEMO-0001"
#: The plant's design was recorded this long before the demo day: before its oldest SIF
#: went into service (at most 12 years ago).
DESIGN_LEAD = dt.timedelta(days=12 * 365 + 90)
TAG_PREFIX = {"pt": "PT", "lt": "LT", "tt": "TT", "ft": "FT", "ls": "LSLL", "plc": "SLS",
              "xv": "XV", "bdv": "BDV", "mcc": "HS"}
# Required PFDavg placed inside each SIL band (for the LOPA arithmetic of the demo).
REQUIRED_PFD = {1: 0.04, 2: 8.0e-3, 3: 8.0e-4}
FULL_INTERVAL_MONTHS = {1: 24, 2: 12, 3: 12}
# Where each SIF's next full test stands today, by position in the list (cycled).
DUE_PATTERN = ["ok", "ok", "soon", "ok", "overdue", "ok", "escalated", "ok", "ok", "soon",
               "ok", "escalated2", "ok", "overdue"]

#: ``progress(what, done, total)``: called as the load goes (``what`` names the SIF just
#: built, or the step done: "library", "demands, bypasses, deferral", "recompute"; or
#: "resume YYYY-MM-DD" before finishing a load cut short, laid on that day).
Progress = Callable[[str, int, int], None]


class DemoAlreadyLoaded(Exception):
    pass


def load(today: dt.date, *, path: Path = DEMO_FILE, progress: Progress | None = None) -> Site:
    """Load the demo plant laid relative to ``today`` and return its site.

    Called inside a transaction, the whole plant is written in that transaction. Called
    outside one (the ``load_demo`` and ``rundemo`` commands), the site with its people and
    device library, then each SIF, then the demands, bypasses and deferral are each
    committed in a transaction of their own: the chain head is one row updated with every
    history entry, and PostgreSQL keeps every version of a row until the transaction
    that wrote them ends, so one transaction for the whole plant makes each entry slower
    than the one before. A load cut short (stopped, killed) is finished by the next call,
    laid on the day it began (read from the site's history), so the plant is the same as
    one loaded in a single go. :class:`DemoAlreadyLoaded` when the plant is complete.

    Follow-up work is suspended while loading; the plans' due dates are refreshed and
    every SIF recomputed once at the end.
    """
    spec = json.loads(path.read_text(encoding="utf-8"))
    code = spec["site"]["code"]
    report = progress or (lambda what, done, total: None)
    site = Site.objects.filter(code=code).first()
    built: set[str] = set()
    if site is not None:
        built = set(SafetyFunction.objects.filter(unit__site=site).values_list("tag", flat=True))
        if _complete(site, spec, built):
            raise DemoAlreadyLoaded(code)
        today = started_on(site)  # finish the load that was cut short, on its own day
        report(f"resume {today:%Y-%m-%d}", len(built), len(spec["sifs"]))
    # One transaction for the whole load when the caller holds one, else one per step.
    whole = transaction.get_connection().in_atomic_block
    step = contextlib.nullcontext if whole else transaction.atomic
    total = len(spec["sifs"])
    with followup.suspended(), (transaction.atomic() if whole else contextlib.nullcontext()):
        builder = _Builder(spec, today)
        with step():
            builder.start(site)
        report("library", 0, total)
        for index, entry in enumerate(spec["sifs"]):
            if entry["tag"] not in built:
                with step():
                    builder.build_sif(index, entry)
            report(entry["tag"], index + 1, total)
        if not Demand.objects.filter(sif__unit__site=builder.site).exists():
            with step():
                builder.build_open_items()
        report("demands, bypasses, deferral", total, total)
    site = builder.site
    refresh_plans(TestPlan.objects.filter(sif__unit__site=site), today)
    calculations().recompute_many(SafetyFunction.objects.filter(unit__site=site),
                                  trigger="demo load")
    report("recompute", total, total)
    return site


def started_on(site: Site) -> dt.date:
    """The demo day a load of the demo site was laid on (its first history row is dated
    when the plant's design was recorded, ``DESIGN_LEAD`` before that day)."""
    first = site.history.order_by("history_date", "history_id").first()
    return first.history_date.date() + DESIGN_LEAD


def _complete(site: Site, spec: dict, built: set[str]) -> bool:
    """Every SIF of the spec built, the open items written (they are written last, in one
    step) and every SIF of the spec assessed (the load's last step)."""
    tags = {e["tag"] for e in spec["sifs"]}
    if not tags <= built:
        return False
    if not Demand.objects.filter(sif__unit__site=site).exists():
        return False
    assessed = (calculations().Assessment.objects.filter(sif__unit__site=site, sif__tag__in=tags)
                .values("sif").distinct().count())
    return assessed == len(tags)


def _at(day: dt.date, hour: int = 10) -> dt.datetime:
    return dt.datetime.combine(day, dt.time(hour, 0), tzinfo=dt.UTC)


class _Builder:
    def __init__(self, spec: dict, today: dt.date):
        self.spec = spec
        self.today = today
        self.designed_at = _at(today - DESIGN_LEAD)
        self.steps: dict[int, dict[int, TestStep]] = {}

    # -- people, site, library ----------------------------------------------------------
    def start(self, site: Site | None):
        """The site, its people and units and the device library; when ``site`` exists
        (a load cut short), read them back instead."""
        if site is not None:
            self.site = site
            usernames = [p["username"] for p in self.spec["people"]]
            self.people = {u.username: u for u in
                           get_user_model().objects.filter(username__in=usernames)}
            self.units = {u.code: u for u in site.units.all()}
            self.types = {t["key"]: DeviceType.objects.get(name=t["name"])
                          for t in self.spec["device_types"]}
            return
        s = self.spec["site"]
        self.site = changes.attribute(Site(
            code=s["code"], name=s["name"], due_soon_days=s["due_soon_days"],
            escalate_share=s["escalate_share"], escalate_days=s["escalate_days"],
            second_escalation_days=s["second_escalation_days"],
        ), None, "demo plant", at=self.designed_at)
        self.site.save()
        User = get_user_model()
        self.people = {}
        password = make_password(DEMO_PASSWORD)  # one hash (salted once) for every person
        for person in self.spec["people"]:
            user, _ = User.objects.get_or_create(
                username=person["username"],
                defaults={"first_name": person["first_name"], "last_name": person["last_name"],
                          "email": f"{person['username']}@saltmere.invalid"},
            )
            user.password = password
            user.save()
            for role in person["roles"]:
                changes.attribute(Membership(user=user, site=self.site, role=role), None,
                                  "demo plant", at=self.designed_at).save()
            self.people[person["username"]] = user
        self.units = {}
        for u in self.spec["units"]:
            unit = changes.attribute(PlantUnit(site=self.site, **u), None, "demo plant",
                                     at=self.designed_at)
            unit.save()
            self.units[u["code"]] = unit
        self.types = {}
        for t in self.spec["device_types"]:
            device_type = DeviceType.objects.filter(name=t["name"]).first()
            if device_type is None:
                device_type = changes.attribute(DeviceType(
                    name=t["name"], role=t["role"], lambda_du_per_hour=t["du"],
                    lambda_dd_per_hour=t["dd"], lambda_s_per_hour=t["s"],
                    device_class=t["class"], systematic_capability=t["sc"],
                    source="Illustrative value for the demo plant (not from a data source)",
                ), None, "demo plant", at=self.designed_at)
                device_type.save()
            self.types[t["key"]] = device_type

    def design(self, instance, at: dt.datetime | None = None):
        """Add a design row through the one write path, by the site's lead, dated (in its
        history) when the plant's design was recorded: before the SIF went into service."""
        return services.create_design(instance, self.people["lead"], reason="demo plant",
                                      reference=DEMO_REFERENCE, at=at or self.designed_at)

    # -- one SIF -------------------------------------------------------------------------
    def build_sif(self, index: int, entry: dict):
        rng = random.Random(entry["tag"])
        tpl = self.spec["templates"][entry["template"]]
        unit = self.units[entry["tag"].split("-")[0]]
        eq = entry["eq"]
        sil = entry["sil"]
        number = entry["tag"].split("-")[-1]
        scenario, required = self.build_scenario(unit, entry, tpl, rng)
        years = rng.uniform(8.0, 12.0)
        in_service = self.today - dt.timedelta(days=int(years * 365))
        setpoint, sp_unit = tpl["setpoint"]
        sif = self.design(SafetyFunction(
            unit=unit, tag=entry["tag"], name=tpl["name"].format(eq=eq),
            safe_state=tpl["safe_state"], demand_mode=choices.DemandMode.LOW,
            target_pfd_avg=required, target_sil=sil,
            process_safety_time_s=tpl["closing_s"] * 6.0,
            required_response_time_s=tpl["closing_s"] * 2.0,
            trip_setpoint=setpoint, setpoint_unit=sp_unit,
            life_stage=choices.LifeStage.IN_SERVICE, in_service_on=in_service,
            owner=self.people["lead"],
        ))
        sif.scenarios.add(scenario)
        sensor_voting = entry.get("sensor_voting", "1oo1")
        final_voting = entry.get("final_voting", "1oo1")
        sensors = self.build_subsystem(sif, choices.SubsystemRole.SENSING, "Sensors",
                                       sensor_voting, tpl["sensor"], number, in_service,
                                       beta=0.05 if sensor_voting != "1oo1" else 0.0)
        logic = self.build_subsystem(sif, choices.SubsystemRole.LOGIC, "Logic solver", "1oo1",
                                     "plc", number, in_service, beta=0.0)
        finals = self.build_subsystem(sif, choices.SubsystemRole.FINAL, "Final elements",
                                      final_voting, tpl["final"], number, in_service,
                                      beta=0.1 if final_voting != "1oo1" else 0.0,
                                      partial=0.6 if tpl["pst"] else 0.0)
        interval = FULL_INTERVAL_MONTHS[sil]
        full_plan = self.design(TestPlan(
            sif=sif, name="Full proof test", kind=choices.TestKind.FULL,
            interval_months=interval, coverage=0.98,
            demand_counts_as_test=tpl["final"] == "mcc", assignee=self.people["tech"],
        ))
        self.design(TestStep(
            plan=full_plan, position=1,
            instruction="Apply a test signal to each transmitter; record the value at which "
                        "the trip is initiated.",
            measured_quantity="Trip value", unit=sp_unit,
            criterion=choices.CriterionKind.AROUND_SETPOINT, target_value=setpoint,
            tolerance=round(abs(setpoint) * 0.02, 3),
        ))
        self.design(TestStep(
            plan=full_plan, position=2,
            instruction="Confirm the logic solver sets its outputs and the trip alarm shows "
                        "in the control room.",
        ))
        self.design(TestStep(
            plan=full_plan, position=3,
            instruction="Trip the final elements; time the stroke from trip to safe state.",
            measured_quantity="Closing time", unit="s",
            criterion=choices.CriterionKind.AT_MOST, limit=float(tpl["closing_s"]),
        ))
        components = sensors + logic + finals
        pattern = DUE_PATTERN[index % len(DUE_PATTERN)]
        if entry["tag"] == "U10-SIF-101":
            pattern = "overdue"
        dates = self.full_test_dates(rng, in_service, interval, pattern)
        self.record(sif, None, choices.TestKind.VALIDATION, in_service, components, rng,
                    setpoint, tpl, fail_rate=0.0)
        hot = entry["tag"] == "U10-SIF-101"  # a SIF whose valve keeps failing
        for day in dates:
            recent = day > self.today - dt.timedelta(days=3 * 365)
            self.record(sif, full_plan, choices.TestKind.FULL, day, components, rng, setpoint,
                        tpl, fail_rate=1.0, force_fail=finals[0] if hot and recent else None)
        if tpl["pst"]:
            pst_plan = self.design(TestPlan(
                sif=sif, name="Partial stroke test", kind=choices.TestKind.PARTIAL,
                interval_months=6, coverage=0.6, assignee=self.people["tech2"],
            ))
            pst_plan.components.set(finals)
            self.design(TestStep(
                plan=pst_plan, position=1,
                instruction="Run the partial stroke from the valve controller; confirm the "
                            "valve moves and returns.",
            ))
            self.partial_tests(sif, pst_plan, finals, in_service, dates, rng)

    def build_scenario(self, unit, entry, tpl, rng):
        sc = tpl["scenario"]
        eq = entry["eq"]
        required = REQUIRED_PFD[entry["sil"]] * rng.uniform(0.85, 1.2)
        layers = math.prod(pfd for _, pfd, _ in sc["layers"])
        mods = math.prod(p for _, p, _ in sc["modifiers"])
        other = sum(f for _, f, _ in sc["causes"][1:])
        needed = sc["tolerable"] / (required * layers * mods)
        first = max(needed - other, needed * 0.2)
        scenario = self.design(HazardScenario(
            site=self.site, unit=unit, reference=f"HZ-{entry['tag'][-3:]}-{unit.code}",
            title=sc["title"].format(eq=eq), consequence=sc["consequence"],
            category=sc["category"], tolerable_frequency_per_year=sc["tolerable"],
        ))
        for n, (desc, freq, basis) in enumerate(sc["causes"]):
            self.design(InitiatingCause(scenario=scenario, description=desc,
                                           frequency_per_year=round(first if n == 0 else freq, 6),
                                           basis=basis))
        for desc, pfd, basis in sc["layers"]:
            self.design(ProtectionLayer(scenario=scenario, description=desc, pfd=pfd,
                                           basis=basis))
        for kind, p, basis in sc["modifiers"]:
            self.design(ConditionalModifier(scenario=scenario, kind=kind, probability=p,
                                               basis=basis))

        result = calculations().lopa_for_scenarios([scenario])
        return scenario, float(f"{result.required_pfd_avg:.3g}")

    def build_subsystem(self, sif, role, name, voting, type_key, number, in_service, *,
                        beta, partial=0.0):
        n = int(voting.split("oo")[1].rstrip("D"))
        sub = self.design(Subsystem(sif=sif, role=role, name=name, voting=voting,
                                       beta=beta, beta_d=beta / 2, mttr_hours=8.0,
                                       mrt_hours=8.0,
                                       position={"sensing": 1, "logic": 2, "final": 3}[role]))
        comps = []
        for i in range(n):
            suffix = "ABC"[i] if n > 1 else ""
            tag = f"{TAG_PREFIX[type_key]}-{number}{suffix}"
            if type_key == "plc":
                tag = f"SLS-{sif.unit.code}-{number}"
            comps.append(self.design(Component(
                subsystem=sub, tag=tag, device_type=self.types[type_key],
                in_service_on=in_service,
                proof_test_coverage=0.95 if role != choices.SubsystemRole.FINAL else 0.98,
                mission_time_years=10.0,
                partial_test_coverage=partial,
                data_basis=choices.DataBasis.GENERIC if type_key != "plc"
                else choices.DataBasis.CERTIFICATE,
            )))
        return comps

    def full_test_dates(self, rng, in_service, interval, pattern) -> list[dt.date]:
        due_offset = {  # days from today to the next due date
            "ok": rng.randint(60, 250), "soon": rng.randint(5, 25), "overdue": -rng.randint(5, 20),
            "escalated": -rng.randint(40, 70), "escalated2": -rng.randint(100, 140),
        }[pattern]
        next_due = self.today + dt.timedelta(days=due_offset)
        last = add_months(next_due, -interval)
        dates = [last]
        while True:
            jitter = rng.randint(-25, 3)  # mostly a little early, as sites plan
            if rng.random() < 0.10:
                jitter = rng.randint(30, 110)  # a late test
            previous = add_months(dates[-1], -interval) - dt.timedelta(days=jitter)
            if previous <= in_service + dt.timedelta(days=60):
                break
            dates.append(previous)
        return sorted(dates)

    def record(self, sif, plan, kind, day, components, rng, setpoint, tpl, *, fail_rate,
               force_fail=None):
        tech = self.people["tech" if rng.random() < 0.6 else "tech2"]
        results = []
        steps = self.steps_of(plan)
        for comp in components:
            # A test finds a DU failure about as often as the device's library rate says
            # (lambda_DU x the plan interval); shutdown valves somewhat more often, so the
            # demo shows a device type flagged by the field-data test.
            interval_h = (plan.interval_months if plan else 12) * calculations().HOURS_PER_MONTH
            rate = fail_rate * comp.lambda_du * interval_h
            if comp.device_type.name.startswith("Shutdown valve"):
                rate *= 1.5
            fails = comp == force_fail or rng.random() < rate
            role = comp.subsystem.role
            measurements = []
            if role == choices.SubsystemRole.SENSING:
                tol = abs(setpoint) * 0.02
                found = setpoint + (rng.uniform(2.0, 4.0) * tol if fails
                                    else rng.uniform(-0.7, 0.7) * tol)
                left = setpoint + rng.uniform(-0.3, 0.3) * tol
                measurements = [
                    services.MeasurementInput("Trip value", round(found, 3), "found",
                                              tpl["setpoint"][1], steps.get(1)),
                    services.MeasurementInput("Trip value", round(left, 3), "left",
                                              tpl["setpoint"][1], steps.get(1)),
                ]
                work = "Transmitter recalibrated and trip re-checked." if fails else ""
                desc = "Trip value outside tolerance as found (drift)." if fails else ""
            elif role == choices.SubsystemRole.FINAL:
                limit = float(tpl["closing_s"])
                found = limit * (rng.uniform(1.3, 3.0) if fails else rng.uniform(0.5, 0.9))
                measurements = [services.MeasurementInput("Closing time", round(found, 1),
                                                          "found", "s", steps.get(3))]
                if fails:
                    measurements.append(services.MeasurementInput(
                        "Closing time", round(limit * 0.7, 1), "left", "s", steps.get(3)))
                work = "Solenoid valve replaced; actuator re-stroked." if fails else ""
                desc = "Valve slow to close / stuck as found." if fails else ""
            else:
                fails = False
                work, desc = "", ""
            results.append(services.ResultInput(
                component=comp, as_found=choices.Verdict.FAIL if fails else choices.Verdict.PASS,
                as_left=choices.Verdict.PASS, work_done=work,
                failure_mode=choices.FailureMode.DANGEROUS_UNDETECTED if fails else "",
                failure_description=desc, measurements=measurements,
            ))
        when = _at(day, rng.randint(8, 15))
        verified = when + dt.timedelta(days=rng.randint(0, 6))
        rec = services.save_draft(user=tech, sif=sif, kind=kind, performed_at=when,
                                  results=results, plan=plan, at=when)
        services.sign_record(rec, tech, None, check_password=False, signed_at=when, at=when)
        services.verify_record(rec, self.people["verifier"], None, check_password=False,
                               verified_at=verified, at=verified)

    def bypass(self, sif, start: dt.datetime, hours: float, **fields):
        """A bypass asked for by the technician, authorised by the lead as it starts."""
        b = services.open_bypass(user=self.people["tech"], sif=sif, started_at=start,
                                 authorised_hours=hours, at=start, **fields)
        return services.authorise_bypass(b, self.people["lead"], check_password=False,
                                         at=start)

    def steps_of(self, plan) -> dict:
        """The plan's steps by position (read once per plan)."""
        if plan is None:
            return {}
        if plan.pk not in self.steps:
            self.steps[plan.pk] = {s.position: s for s in plan.steps.all()}
        return self.steps[plan.pk]

    def partial_tests(self, sif, plan, finals, in_service, full_dates, rng):
        last_full = full_dates[-1] if full_dates else in_service
        day = in_service + dt.timedelta(days=182)
        while day < self.today - dt.timedelta(days=20):
            if all(abs((day - f).days) > 45 for f in full_dates) and rng.random() < 0.9:
                fails = rng.random() < 0.004
                results = [services.ResultInput(
                    component=c,
                    as_found=choices.Verdict.FAIL if fails and i == 0 else choices.Verdict.PASS,
                    as_left=choices.Verdict.PASS,
                    failure_mode=choices.FailureMode.DANGEROUS_UNDETECTED
                    if fails and i == 0 else "",
                    failure_description="Valve did not move on partial stroke."
                    if fails and i == 0 else "",
                    work_done="Actuator freed and re-stroked." if fails and i == 0 else "",
                ) for i, c in enumerate(finals)]
                tech = self.people["tech2"]
                when = _at(day, 9)
                rec = services.save_draft(user=tech, sif=sif, kind=choices.TestKind.PARTIAL,
                                          performed_at=when, results=results, plan=plan,
                                          at=when)
                services.sign_record(rec, tech, None, check_password=False, signed_at=when,
                                     at=when)
                services.verify_record(rec, self.people["verifier"], None,
                                       check_password=False, verified_at=when, at=when)
            day = add_months(day, 6) + dt.timedelta(days=rng.randint(-15, 3))
        del last_full

    # -- demands, bypasses, deferrals ------------------------------------------------------
    def build_open_items(self):
        lead, tech = self.people["lead"], self.people["tech"]
        sifs = {s.tag: s for s in SafetyFunction.objects.filter(unit__site=self.site)}
        rng = random.Random("demo-open-items")
        # Real demands: mostly successful; one where the valve failed; a run of demands on a
        # SIF whose LOPA assumed them rare; a few spurious trips.
        demand_plan = [
            ("U30-SIF-303", 400, True, False), ("U30-SIF-303", 700, True, False),
            ("U30-SIF-303", 1000, True, False), ("U30-SIF-303", 150, True, False),
            ("U10-SIF-106", 300, True, False), ("U20-SIF-204", 900, True, False),
            ("U40-SIF-402", 1500, False, False), ("U10-SIF-103", 60, True, True),
            ("U50-SIF-503", 500, True, True), ("U20-SIF-205", 1200, True, True),
        ]
        for tag, days_ago, ok, spurious in demand_plan:
            sif = sifs[tag]
            comps = list(Component.objects.filter(subsystem__sif=sif))
            failed = [c for c in comps if c.subsystem.role == choices.SubsystemRole.FINAL][:1]
            occurred = _at(self.today - dt.timedelta(days=days_ago), 3)
            services.record_demand(
                user=tech, sif=sif, occurred_at=occurred, at=occurred,
                successful=ok, spurious=spurious,
                description=("Spurious trip: transmitter signal spike." if spurious else
                             "Process demand: trip initiated on high reading." if ok else
                             "Process demand: final element failed to reach safe state; "
                             "operator closed the manual isolation."),
                components_exercised=comps if ok else [c for c in comps if c not in failed],
                failed_components=[] if ok else failed,
            )
        # Bypasses: closed ones in the past, one open within time, one open too long. Each
        # is asked for by the technician doing the work and authorised by the lead when
        # put in place.
        for tag in rng.sample(sorted(sifs), 12):
            start = _at(self.today - dt.timedelta(days=rng.randint(30, 2500)), 7)
            hours = rng.choice([4, 8, 12, 24, 36])
            b = self.bypass(sifs[tag], start, hours, reason="Transmitter maintenance",
                            compensating_measures=(
                                "Operator stationed at local gauge with radio"
                                if rng.random() < 0.5 else ""), measures_effective=False)
            end = start + dt.timedelta(hours=hours * rng.uniform(0.3, 1.4))
            services.close_bypass(b, lead, ended_at=end, at=end)
        # noon of the demo day, or the present moment when loading before noon (a record
        # is never dated in the future)
        now = min(dt.datetime.combine(self.today, dt.time(12, 0), tzinfo=dt.UTC),
                  timezone.now())
        self.bypass(sifs["U30-SIF-302"], now - dt.timedelta(hours=3), 12,
                    reason="Level transmitter LT-302B replacement",
                    compensating_measures="Two remaining transmitters in 1oo2; operator "
                                          "watches local gauge")
        self.bypass(sifs["U40-SIF-404"], now - dt.timedelta(hours=80), 24,
                    reason="Tank gauging upgrade",
                    compensating_measures="Manual dip every 2 h during filling")
        # A pending deferral request on a plan coming due, asked for today.
        plan = TestPlan.objects.filter(sif=sifs["U10-SIF-105"], kind="full").first()
        due = due_date(plan, self.today)
        schedule_services.request_deferral(
            user=tech, plan=plan, proposed_on=due + dt.timedelta(days=45),
            reason="Unit turnaround moved by six weeks; the test needs the unit shut down.",
            due_on=due, at=now)
