"""Settings for the test suite: fast hashing, in-memory mail, eager tasks unless told otherwise.

The suite runs in parallel processes (pytest-xdist, ``-n``). Each process gets its own
test database (pytest-django adds ``_gw0``, ``_gw1``), its own Redis database for the
broker and its own var folder, set here before the base settings read the environment,
so that the real workers the integration tests start talk only to their own process.
"""

import os
import re

_worker = os.environ.get("PYTEST_XDIST_WORKER", "")
if _worker and os.environ.get("SIF_LEDGER_TEST_WORKER") != _worker:
    _n = int(re.sub(r"\D", "", _worker) or 0)
    _broker = os.environ.get("CELERY_BROKER_URL", "")
    _m = re.fullmatch(r"(redis://[^/]+)(?:/(\d+))?", _broker)
    if _m:
        os.environ["CELERY_BROKER_URL"] = f"{_m[1]}/{(int(_m[2] or 0) + 1 + _n) % 16}"
    _var = os.environ.get("SIF_LEDGER_VAR_DIR") or os.path.join(
        os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))), "var")
    os.environ["SIF_LEDGER_VAR_DIR"] = f"{_var}-{_worker}"
    os.environ["SIF_LEDGER_TEST_WORKER"] = _worker  # applied once, inherited by workers

from config.settings.base import *  # noqa: E402, F403
from config.settings.env import env_bool  # noqa: E402

PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]
EMAIL_BACKEND = "django.core.mail.backends.locmem.EmailBackend"
# Unit tests run tasks in-process; the integration tests start a real worker and beat
# with their own settings.
CELERY_TASK_ALWAYS_EAGER = env_bool("TEST_CELERY_EAGER", True)
STORAGES = {
    "default": {"BACKEND": "django.core.files.storage.FileSystemStorage"},
    "staticfiles": {"BACKEND": "django.contrib.staticfiles.storage.StaticFilesStorage"},
}

# Each test process keeps its cache in memory (cleared before every test,
# tests/conftest.py): the database cache's own connection would write outside the
# transaction each test is rolled back in.
CACHES = {"default": {"BACKEND": "django.core.cache.backends.locmem.LocMemCache"}}
DATABASES.pop("cache", None)  # noqa: F405
DATABASE_ROUTERS = []
