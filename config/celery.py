"""The Celery application. Settings come from Django settings with the CELERY_ prefix."""

import os

from celery import Celery

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")
# One BLAS thread per process: the small matrices of the exact design model run 3-15x
# slower with OpenBLAS threads fighting over two cores; parallelism comes from workers.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

app = Celery("sif_ledger")
app.config_from_object("django.conf:settings", namespace="CELERY")
app.autodiscover_tasks()
