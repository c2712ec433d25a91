import datetime as dt
import time
from pathlib import Path

from django.conf import settings
from django.core.management.base import BaseCommand
from django.utils import timezone

from register import demo
from register.calculations import calculations
from register.management.commands.rundemo import mail_to_files, no_query_log, quiet_task_log
from register.models import SafetyFunction, TestRecord


class Command(BaseCommand):
    help = ("Load the invented demo plant (dates relative to today), showing each SIF as it "
            "is built. Loading twice does not duplicate: a loaded demo site is left as it "
            "is, and a load that was cut short is finished on the day it began.")

    def add_arguments(self, parser):
        parser.add_argument("--today", type=dt.date.fromisoformat,
                            help="lay the history relative to this date (YYYY-MM-DD) "
                                 "instead of today")

    def handle(self, *args, **opts):
        today = opts["today"] or timezone.localdate()
        shown = opts["verbosity"] >= 1
        one_line = shown and self.stdout.isatty()  # a terminal: one line, rewritten
        started = time.monotonic()

        def progress(what: str, done: int, total: int) -> None:
            if not shown:
                return
            if what.startswith("resume"):
                self.stdout.write(f"  finishing a load that was cut short ({done} of {total} "
                                  f"SIFs built), laid on its day, {what.split()[1]}")
            elif what == "library":
                self.stdout.write("  site, people and device library: done")
            elif what == "recompute":
                self.stdout.write("  due dates and figures of every SIF: done")
            elif done == total and what.startswith("demands"):
                if one_line:
                    self.stdout.write("")
                self.stdout.write(f"  {what}: done")
            elif one_line:
                self.stdout.write(f"\r  SIF {done:2d}/{total} {what}", ending="")
                self.stdout.flush()
            else:
                self.stdout.write(f"  SIF {done:2d}/{total} {what}")

        try:
            # e-mails of the notifications the history raises go to files, not the console
            with (no_query_log(), quiet_task_log(),
                  mail_to_files(Path(settings.VAR_DIR) / "demo-mail") as mail_folder):
                site = demo.load(today, progress=progress)
        except demo.DemoAlreadyLoaded as exc:
            self.stdout.write(f"The demo site '{exc}' is already loaded; nothing changed.")
            return
        sifs = list(SafetyFunction.objects.filter(unit__site=site).values_list("pk", flat=True))
        latest = calculations().latest_assessments(sifs)
        meeting = sum(1 for a in latest.values() if a.meets_target)
        records = TestRecord.objects.filter(sif__unit__site=site).count()
        self.stdout.write(self.style.SUCCESS(
            f"Loaded {site.name} in {time.monotonic() - started:.0f} s: "
            f"{site.units.count()} units, {len(sifs)} SIFs ({meeting} meet their target, "
            f"{len(sifs) - meeting} do not), {records} test records. Sign in as lead, tech, "
            f"tech2, verifier or auditor with password '{demo.DEMO_PASSWORD}'."))
        if mail_folder is not None and any(mail_folder.iterdir()):
            self.stdout.write(f"E-mails of the notifications are in {mail_folder}/ (the demo "
                              "has no mail server); each person sees them in /inbox/.")
