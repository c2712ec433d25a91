"""The Celery application. Settings come from Django settings with the CELERY_ prefix."""

import os

from celery import Celery
from celery.signals import worker_init

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")
# One BLAS thread per process: the small matrices of the exact design model run 3-15x
# slower with OpenBLAS threads fighting over two cores; parallelism comes from workers.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

app = Celery("sif_ledger")
app.config_from_object("django.conf:settings", namespace="CELERY")
app.autodiscover_tasks()


@worker_init.connect
def _warm_before_fork(**_):
    """Import once, in the worker's main process before its pool forks, what the tasks
    import lazily: the engine (numpy, scipy), the evidence pack's PDF kit with its fonts.
    Every pool process then starts warm; otherwise each one paid these imports on its
    first task (a pack's first two sections took three times as long as the others)."""
    import django

    django.setup()
    import calcs.adapter  # noqa: F401
    from register.audit.evidence import pdf

    pdf.load_fonts_and_styles()
