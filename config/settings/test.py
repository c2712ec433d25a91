"""Settings for the test suite: fast hashing, in-memory mail, eager tasks unless told otherwise."""

from config.settings.base import *  # noqa: F403
from config.settings.env import env_bool

PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]
EMAIL_BACKEND = "django.core.mail.backends.locmem.EmailBackend"
# Unit tests run tasks in-process; the integration tests start a real worker and beat
# with their own settings.
CELERY_TASK_ALWAYS_EAGER = env_bool("TEST_CELERY_EAGER", True)
STORAGES = {
    "default": {"BACKEND": "django.core.files.storage.FileSystemStorage"},
    "staticfiles": {"BACKEND": "django.contrib.staticfiles.storage.StaticFilesStorage"},
}
