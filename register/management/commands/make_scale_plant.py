"""Generate a large invented plant for benchmarks: N SIFs, 5 components each, years of tests.

Rows are bulk-inserted (this is synthetic benchmark data, not a register anyone keeps), so
the command takes seconds for thousands of SIFs. Every record is signed and verified.
"""

import datetime as dt
import random

from django.contrib.auth import get_user_model
from django.core.management.base import BaseCommand
from django.db import transaction
from django.utils import timezone

from register import choices
from register.models import (
    Component,
    ComponentResult,
    DeviceType,
    Membership,
    PlantUnit,
    SafetyFunction,
    Site,
    Subsystem,
    TestPlan,
    TestRecord,
)
from register.schedule.due import refresh_plans


class Command(BaseCommand):
    help = "Generate a scale plant (synthetic) for benchmarks."

    def add_arguments(self, parser):
        parser.add_argument("--sifs", type=int, default=5000)
        parser.add_argument("--years", type=int, default=20)
        parser.add_argument("--code", default="scale")

    @transaction.atomic
    def handle(self, *args, **opts):
        n, years, code = opts["sifs"], opts["years"], opts["code"]
        if Site.objects.filter(code=code).exists():
            self.stdout.write(f"Site '{code}' exists; nothing done.")
            return
        rng = random.Random(7)
        today = timezone.localdate()
        site = Site.objects.create(code=code, name=f"Scale plant ({n} SIFs)")
        User = get_user_model()
        tech, _ = User.objects.get_or_create(username=f"{code}-tech")
        verifier, _ = User.objects.get_or_create(username=f"{code}-verifier")
        Membership.objects.create(user=tech, site=site, role=choices.Role.TECHNICIAN)
        Membership.objects.create(user=verifier, site=site, role=choices.Role.VERIFIER)
        units = PlantUnit.objects.bulk_create(
            [PlantUnit(site=site, code=f"S{i:02d}", name=f"Scale unit {i}") for i in range(20)])
        sensor, _ = DeviceType.objects.get_or_create(
            name="Scale sensor", defaults=dict(role="sensing", lambda_du_per_hour=4e-7,
                                               lambda_dd_per_hour=1e-6, lambda_s_per_hour=1e-6,
                                               source="synthetic"))
        valve, _ = DeviceType.objects.get_or_create(
            name="Scale valve", defaults=dict(role="final", lambda_du_per_hour=8e-7,
                                              lambda_s_per_hour=1e-6, device_class="A",
                                              source="synthetic"))
        logic, _ = DeviceType.objects.get_or_create(
            name="Scale logic", defaults=dict(role="logic", lambda_du_per_hour=1e-8,
                                              lambda_dd_per_hour=5e-7, source="synthetic"))
        start = today - dt.timedelta(days=365 * years)
        sifs = SafetyFunction.objects.bulk_create([
            SafetyFunction(unit=units[i % 20], tag=f"SC-{i:05d}", name="Scale SIF",
                           safe_state="safe", target_pfd_avg=8e-3, target_sil=2,
                           in_service_on=start) for i in range(n)], batch_size=2000)
        subs = []
        for s in sifs:
            subs += [Subsystem(sif=s, role="sensing", name="Sensors", voting="1oo2", beta=0.05,
                               beta_d=0.025, position=1),
                     Subsystem(sif=s, role="logic", name="Logic", voting="1oo1", position=2),
                     Subsystem(sif=s, role="final", name="Valves", voting="1oo2", beta=0.1,
                               beta_d=0.05, position=3)]
        subs = Subsystem.objects.bulk_create(subs, batch_size=5000)
        comps = []
        for sub in subs:
            typ = {"sensing": sensor, "logic": logic, "final": valve}[sub.role]
            count = 1 if sub.role == "logic" else 2
            for k in range(count):
                comps.append(Component(subsystem=sub, tag=f"{sub.sif.tag}-{sub.role[0]}{k}",
                                       device_type=typ, in_service_on=start,
                                       partial_test_coverage=0.0))
        comps = Component.objects.bulk_create(comps, batch_size=5000)
        plans = TestPlan.objects.bulk_create(
            [TestPlan(sif=s, name="Full proof test", interval_months=12) for s in sifs],
            batch_size=5000)
        by_sif = {}
        for c in comps:
            by_sif.setdefault(c.subsystem.sif_id, []).append(c)
        records, results = [], []
        for s, plan in zip(sifs, plans):
            day = start
            while True:
                day = day + dt.timedelta(days=365 + rng.randint(-20, 40))
                if day >= today:
                    break
                at = dt.datetime.combine(day, dt.time(10), tzinfo=dt.UTC)
                records.append(TestRecord(
                    sif=s, plan=plan, kind=choices.TestKind.FULL, performed_at=at,
                    performed_by=tech, verified_by=verifier, status="draft", signed_at=at,
                    verified_at=at, performed_by_name=tech.username,
                    verified_by_name=verifier.username))
        records = TestRecord.objects.bulk_create(records, batch_size=5000)
        for rec in records:
            for c in by_sif[rec.sif_id]:
                fail = rng.random() < 0.005
                results.append(ComponentResult(
                    record=rec, component=c, as_found="fail" if fail else "pass", as_left="pass",
                    failure_mode="du" if fail else "", failure_description="synthetic" if fail
                    else "", work_done="repaired" if fail else ""))
        ComponentResult.objects.bulk_create(results, batch_size=10000)
        # Results go in while the records are drafts; then the records are signed (the
        # database refuses results added to a signed record).
        TestRecord.objects.filter(pk__in=[r.pk for r in records]).update(status="verified")
        # Each plan's stored due date and state dates, as the register writes them when a
        # plan is made or a record signed (the lists, the worklist and the scan read them).
        refresh_plans(TestPlan.objects.filter(sif__unit__site=site), today, many=True)
        self.stdout.write(f"Created {n} SIFs, {len(comps)} components, {len(records)} test "
                          f"records, {len(results)} component results.")
