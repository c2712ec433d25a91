"""Check the tamper-evident change chain; exit 1 and name the first broken entry."""

from django.core.management.base import BaseCommand, CommandError

from register.audit.chain import verify_chain


class Command(BaseCommand):
    help = "Recompute the change chain from the history and report the first broken entry."

    def handle(self, *args, **opts):
        result = verify_chain()
        if not result.ok:
            raise CommandError(result.summary(), returncode=1)
        self.stdout.write(result.summary())
