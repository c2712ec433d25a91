import datetime as dt

from django.core.management.base import BaseCommand
from django.utils import timezone

from register import demo


class Command(BaseCommand):
    help = ("Load the invented demo plant (dates relative to today). Loading twice does not "
            "duplicate: an existing demo site is left as it is.")

    def add_arguments(self, parser):
        parser.add_argument("--today", type=dt.date.fromisoformat,
                            help="lay the history relative to this date instead of today")

    def handle(self, *args, **opts):
        today = opts["today"] or timezone.localdate()
        try:
            site = demo.load(today)
        except demo.DemoAlreadyLoaded as exc:
            self.stdout.write(f"The demo site '{exc}' is already loaded; nothing changed.")
            return
        self.stdout.write(self.style.SUCCESS(
            f"Loaded {site.name}: {site.units.count()} units, "
            f"{sum(u.sifs.count() for u in site.units.all())} SIFs. "
            f"Sign in as lead, tech, verifier or auditor with password '{demo.DEMO_PASSWORD}'."))
