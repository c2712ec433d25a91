"""The Celery application. Settings come from Django settings with the CELERY_ prefix."""

import os
from pathlib import Path

from celery import Celery

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")

app = Celery("sif_ledger")
app.config_from_object("django.conf:settings", namespace="CELERY")
app.autodiscover_tasks()


@app.on_configure.connect
def _make_broker_folders(sender, **kwargs):
    """The filesystem broker (embedded default) needs its folders to exist."""
    options = sender.conf.broker_transport_options or {}
    for key in ("data_folder_in", "data_folder_out", "control_folder", "processed_folder"):
        if options.get(key):
            Path(options[key]).mkdir(parents=True, exist_ok=True)
