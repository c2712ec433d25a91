"""Check the tamper-evident change chain; exit 1 and name the first broken entry."""

from django.core.management.base import BaseCommand, CommandError

from register.audit.chain import verify_chain


class Command(BaseCommand):
    help = ("Recompute the change chain from the history and report the first broken entry "
            "(from the first entry, or with --from-checkpoint from where the last check "
            "stopped).")

    def add_arguments(self, parser):
        parser.add_argument("--from-checkpoint", action="store_true",
                            help="Recompute only from the entry the last intact check reached.")

    def handle(self, *args, **opts):
        result = verify_chain(incremental=opts["from_checkpoint"])
        if not result.ok:
            raise CommandError(result.summary(), returncode=1)
        self.stdout.write(result.summary())
