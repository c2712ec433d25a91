import contextlib
import logging
from pathlib import Path

from django.conf import settings
from django.core.management import call_command
from django.core.management.base import BaseCommand
from django.db import connection
from django.db.migrations.executor import MigrationExecutor
from django.utils import timezone

from register.models import Notification

CONSOLE_MAIL = "django.core.mail.backends.console.EmailBackend"
FILE_MAIL = "django.core.mail.backends.filebased.EmailBackend"


@contextlib.contextmanager
def no_query_log():
    """With DEBUG on (the demo's default) every SQL query is also logged, which makes the
    load about a tenth slower; preparing (``rundemo``, ``load_demo``) needs no log."""
    saved = settings.DEBUG
    settings.DEBUG = False
    try:
        yield
    finally:
        settings.DEBUG = saved


@contextlib.contextmanager
def quiet_task_log():
    """Background tasks run in-process on the demo; their one line per task is noise here,
    and so is the broker's warning that the demo's filesystem broker names no host."""
    logs = {logging.getLogger("celery.app.trace"): logging.WARNING,
            logging.getLogger("kombu.connection"): logging.ERROR}
    levels = {log: log.level for log in logs}
    for log, level in logs.items():
        log.setLevel(level)
    try:
        yield
    finally:
        for log, level in levels.items():
            log.setLevel(level)


@contextlib.contextmanager
def mail_to_files(folder: Path):
    """While preparing the demo, e-mails that would be printed on the console are written
    to files in ``folder`` instead (one per message); any other mail backend is kept."""
    if settings.EMAIL_BACKEND != CONSOLE_MAIL:
        yield None
        return
    saved = settings.EMAIL_BACKEND, getattr(settings, "EMAIL_FILE_PATH", None)
    folder.mkdir(parents=True, exist_ok=True)
    settings.EMAIL_BACKEND, settings.EMAIL_FILE_PATH = FILE_MAIL, str(folder)
    try:
        yield folder
    finally:
        settings.EMAIL_BACKEND, settings.EMAIL_FILE_PATH = saved


class Command(BaseCommand):
    help = ("Prepare and serve the demo on this machine: migrate the database, load the demo "
            "plant (once: running again changes nothing), run the due-date scan, then serve "
            "the site (runserver) at ADDRPORT.")

    def add_arguments(self, parser):
        parser.add_argument(
            "addrport", nargs="?", default="127.0.0.1:8000",
            help="where to serve, as for runserver: a port (8000), an address and port "
                 "(0.0.0.0:8000 to be reached from other machines) or [IPv6 address]:port; "
                 "default 127.0.0.1:8000 (this machine only)")
        parser.add_argument("--no-serve", action="store_true",
                            help="prepare only (migrate, load, scan); do not serve")

    def handle(self, *args, **opts):
        started = timezone.now()
        out = self.stdout._out  # the commands below write to the same stream (a terminal?)
        executor = MigrationExecutor(connection)
        pending = len(executor.migration_plan(executor.loader.graph.leaf_nodes()))
        self.stdout.write(f"1/3 Migrating the database {connection.settings_dict['NAME']}: "
                          + (f"applying {pending} migrations..." if pending else "up to date."))
        call_command("migrate", interactive=False, verbosity=0)
        if pending:
            self.stdout.write("    done.")
        mail = Path(settings.VAR_DIR) / "demo-mail"
        with mail_to_files(mail) as mail_folder, quiet_task_log(), no_query_log():
            self.stdout.write("2/3 Loading the demo plant:")
            call_command("load_demo", stdout=out)
            self.stdout.write("3/3 Running the due-date scan:")
            call_command("scan_plans", stdout=out)
        self.stdout.write(self._mail_summary(started, mail_folder))
        if opts["no_serve"]:
            return
        self.stdout.write(f"Open http://{opts['addrport']}/ and sign in as 'lead' "
                          "(password demo-pass-2026).")
        call_command("runserver", opts["addrport"], use_reloader=False)

    def _mail_summary(self, started, folder: Path | None) -> str:
        """One line on the notifications created and e-mailed while preparing."""
        created = Notification.objects.filter(created_at__gte=started).count()
        sent = Notification.objects.filter(emailed_at__gte=started)
        people = sorted(set(sent.values_list("recipient__username", flat=True)))
        if not created and not people:
            return "E-mails: none (no new notifications)."
        where = (f" The texts are in {folder}/ (the demo has no mail server)."
                 if folder and people else "")
        return (f"E-mails: {created} new notifications; {sent.count()} e-mailed"
                + (f" to {', '.join(people)}." if people else ".") + where
                + " Each person also sees them in the inbox (/inbox/).")
