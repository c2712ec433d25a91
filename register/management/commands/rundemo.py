from django.core.management import call_command
from django.core.management.base import BaseCommand


class Command(BaseCommand):
    help = ("Prepare and serve the demo on this machine: migrate, load the demo plant "
            "(once), run the due-date scan, then serve on http://127.0.0.1:8000/.")

    def add_arguments(self, parser):
        parser.add_argument("addrport", nargs="?", default="127.0.0.1:8000")
        parser.add_argument("--no-serve", action="store_true", help="prepare only")

    def handle(self, *args, **opts):
        call_command("migrate", interactive=False, verbosity=0)
        call_command("load_demo")
        call_command("scan_plans")
        if opts["no_serve"]:
            return
        self.stdout.write(f"Open http://{opts['addrport']}/ and sign in as 'lead' "
                          "(password demo-pass-2026).")
        call_command("runserver", opts["addrport"], use_reloader=False)
