"""Settings shared by every environment; everything site-specific comes from the environment.

Defaults give a working demo on one machine: SQLite in ``var/`` and Celery on a
filesystem broker (no Redis needed). Set ``DATABASE_URL`` and
``CELERY_BROKER_URL`` to use PostgreSQL and Redis.
"""

import os
from pathlib import Path

import dj_database_url

from config.settings.env import env_bool, env_int, env_list, env_str

# One BLAS thread per process, for every entry point that loads these settings (see
# config/celery.py); set before the engine first imports numpy.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

BASE_DIR = Path(__file__).resolve().parent.parent.parent
VAR_DIR = Path(env_str("SIF_LEDGER_VAR_DIR", str(BASE_DIR / "var")))
VAR_DIR.mkdir(parents=True, exist_ok=True)

SECRET_KEY = env_str("SECRET_KEY", "dev-only-insecure-key-change-me")
# Key of the change chain's HMAC-SHA256 hashes (register.audit.chain). Off production a
# key derived from SECRET_KEY stands in; production refuses to start without its own.
CHAIN_KEY = env_str("CHAIN_KEY") or __import__("hashlib").sha256(
    f"sif-ledger change chain|{SECRET_KEY}".encode()).hexdigest()
# The chain's head is written here from time to time, outside the database.
CHAIN_ANCHOR_FILE = env_str("CHAIN_ANCHOR_FILE", str(VAR_DIR / "chain-anchors.jsonl"))
DEBUG = env_bool("DEBUG", True)
ALLOWED_HOSTS = env_list("ALLOWED_HOSTS", "localhost,127.0.0.1,[::1],testserver")
CSRF_TRUSTED_ORIGINS = env_list("CSRF_TRUSTED_ORIGINS")

INSTALLED_APPS = [
    "django.contrib.admin",
    "django.contrib.auth",
    "django.contrib.contenttypes",
    "django.contrib.sessions",
    "django.contrib.messages",
    "django.contrib.staticfiles",
    "django.contrib.humanize",
    "rest_framework",
    "rest_framework.authtoken",
    "django_filters",
    "drf_spectacular",
    "django_htmx",
    "simple_history",
    "register",
    "calcs",
]

MIDDLEWARE = [
    "django.middleware.security.SecurityMiddleware",
    "register.request_guard.RequestGuard",
    "whitenoise.middleware.WhiteNoiseMiddleware",
    "django.contrib.sessions.middleware.SessionMiddleware",
    "django.middleware.common.CommonMiddleware",
    "django.middleware.csrf.CsrfViewMiddleware",
    "django.contrib.auth.middleware.AuthenticationMiddleware",
    "django.contrib.messages.middleware.MessageMiddleware",
    "django.middleware.clickjacking.XFrameOptionsMiddleware",
    "django_htmx.middleware.HtmxMiddleware",
    "simple_history.middleware.HistoryRequestMiddleware",
]

ROOT_URLCONF = "config.urls"
WSGI_APPLICATION = "config.wsgi.application"

TEMPLATES = [
    {
        "BACKEND": "django.template.backends.django.DjangoTemplates",
        "DIRS": [BASE_DIR / "templates"],
        "APP_DIRS": True,
        "OPTIONS": {
            "context_processors": [
                "django.template.context_processors.request",
                "django.contrib.auth.context_processors.auth",
                "django.contrib.messages.context_processors.messages",
                "register.inbox.context.unread",
                "register.accounts.menu.menu",
            ],
        },
    },
]

DATABASES = {
    "default": dj_database_url.parse(
        env_str("DATABASE_URL", f"sqlite:///{VAR_DIR / 'sif_ledger.sqlite3'}"),
        conn_max_age=env_int("DB_CONN_MAX_AGE", 0),
    )
}
# The project's backends: Django's own, appending the change chain's entries of a
# transaction just before it commits (register.dbwrap).
DATABASES["default"]["ENGINE"] = {
    "django.db.backends.postgresql": "register.dbwrap.postgresql",
    "django.db.backends.sqlite3": "register.dbwrap.sqlite3",
}.get(DATABASES["default"]["ENGINE"], DATABASES["default"]["ENGINE"])
# Every request in one transaction: a request refused or failing half-way writes nothing
# (after-commit work, such as recomputes and e-mails, runs once the request commits).
DATABASES["default"]["ATOMIC_REQUESTS"] = env_bool("ATOMIC_REQUESTS", True)
if DATABASES["default"]["ENGINE"].endswith("sqlite3"):
    # Wait for a lock instead of failing at once; take the write lock at BEGIN so two
    # writers never deadlock on lock upgrade.
    DATABASES["default"]["OPTIONS"] = {"timeout": 20, "transaction_mode": "IMMEDIATE"}

DEFAULT_AUTO_FIELD = "django.db.models.BigAutoField"

AUTH_PASSWORD_VALIDATORS = [
    {"NAME": "django.contrib.auth.password_validation.UserAttributeSimilarityValidator"},
    {"NAME": "django.contrib.auth.password_validation.MinimumLengthValidator",
     "OPTIONS": {"min_length": 12}},
    {"NAME": "django.contrib.auth.password_validation.CommonPasswordValidator"},
    {"NAME": "django.contrib.auth.password_validation.NumericPasswordValidator"},
]
LOGIN_URL = "login"
LOGIN_REDIRECT_URL = "landing"
LOGOUT_REDIRECT_URL = "login"

LANGUAGE_CODE = "en-gb"
TIME_ZONE = env_str("TIME_ZONE", "UTC")
USE_I18N = True
USE_TZ = True

STATIC_URL = "static/"
STATIC_ROOT = VAR_DIR / "static"
STATIC_ROOT.mkdir(exist_ok=True)  # whitenoise warns when it is missing (before collectstatic)
STATICFILES_DIRS = [BASE_DIR / "static"]
MEDIA_URL = "media/"
MEDIA_ROOT = Path(env_str("MEDIA_ROOT", str(VAR_DIR / "media")))
STORAGES = {
    "default": {"BACKEND": "django.core.files.storage.FileSystemStorage"},
    "staticfiles": {"BACKEND": "whitenoise.storage.CompressedStaticFilesStorage"},
}
# Attachments (photos, scans) uploaded with test records.
ATTACHMENT_MAX_BYTES = env_int("ATTACHMENT_MAX_BYTES", 10 * 1024 * 1024)
DATA_UPLOAD_MAX_MEMORY_SIZE = 12 * 1024 * 1024
# The whole body of any request, files included (register.request_guard: 413 above it).
REQUEST_MAX_BYTES = env_int("REQUEST_MAX_BYTES", 16 * 1024 * 1024)
# Spreadsheet import (README, "Import limits"): the file's size and its rows, counted
# while reading (a sheet's own stated size is not trusted).
IMPORT_MAX_BYTES = env_int("IMPORT_MAX_BYTES", 5 * 1024 * 1024)
IMPORT_MAX_ROWS = env_int("IMPORT_MAX_ROWS", 20_000)
# More rows than this: Confirm queues the import as a background job with a progress page.
IMPORT_BACKGROUND_ROWS = env_int("IMPORT_BACKGROUND_ROWS", 200)
# Register exports of more SIFs than this are written by a background job with a progress
# page and offered for download to the person who asked (README, "Exports").
EXPORT_BACKGROUND_SIFS = env_int("EXPORT_BACKGROUND_SIFS", 2000)
# A background export's file is removed this many days after it was written.
EXPORT_KEEP_DAYS = env_int("EXPORT_KEEP_DAYS", 7)

EMAIL_BACKEND = env_str("EMAIL_BACKEND", "django.core.mail.backends.console.EmailBackend")
DEFAULT_FROM_EMAIL = env_str("DEFAULT_FROM_EMAIL", "sif-ledger@localhost")
EMAIL_HOST = env_str("EMAIL_HOST", "localhost")
EMAIL_PORT = env_int("EMAIL_PORT", 25)
EMAIL_HOST_USER = env_str("EMAIL_HOST_USER", "")
EMAIL_HOST_PASSWORD = env_str("EMAIL_HOST_PASSWORD", "")
EMAIL_USE_TLS = env_bool("EMAIL_USE_TLS", False)
EMAIL_USE_SSL = env_bool("EMAIL_USE_SSL", False)
EMAIL_TIMEOUT = env_int("EMAIL_TIMEOUT", 20)
# Address of the site as users reach it, for links in e-mails.
SITE_URL = env_str("SITE_URL", "http://127.0.0.1:8000").rstrip("/")

# --- Celery -------------------------------------------------------------------------
CELERY_BROKER_URL = env_str("CELERY_BROKER_URL", "filesystem://")
CELERY_RESULT_BACKEND = env_str("CELERY_RESULT_BACKEND", None)
CELERY_TASK_ALWAYS_EAGER = env_bool("CELERY_TASK_ALWAYS_EAGER", CELERY_BROKER_URL == "filesystem://")
CELERY_TASK_EAGER_PROPAGATES = False
CELERY_TASK_SERIALIZER = "json"
CELERY_ACCEPT_CONTENT = ["json"]
CELERY_TASK_ACKS_LATE = True
CELERY_WORKER_PREFETCH_MULTIPLIER = 1
CELERY_TIMEZONE = TIME_ZONE
CELERY_BEAT_SCHEDULE_FILENAME = str(VAR_DIR / "celerybeat-schedule")
_broker_dir = VAR_DIR / "broker"
CELERY_BROKER_TRANSPORT_OPTIONS = (
    {
        "data_folder_in": str(_broker_dir / "queue"),
        "data_folder_out": str(_broker_dir / "queue"),
        "control_folder": str(_broker_dir / "control"),
        "processed_folder": str(_broker_dir / "processed"),
        "store_processed": False,
    }
    if CELERY_BROKER_URL.startswith("filesystem")
    else {}
)
for _folder in ("queue", "control", "processed"):
    if CELERY_BROKER_URL.startswith("filesystem"):
        (_broker_dir / _folder).mkdir(parents=True, exist_ok=True)
# Periodic work: the due-date scan and the nightly recompute. Periods in seconds,
# overridable from the environment.
SCAN_PERIOD_SECONDS = env_int("SCAN_PERIOD_SECONDS", 15 * 60)
RECOMPUTE_HOUR_UTC = env_int("RECOMPUTE_HOUR_UTC", 2)
JOB_SWEEP_SECONDS = env_int("JOB_SWEEP_SECONDS", 5 * 60)
# An import or export job still queued this long after it was asked for is sent again.
JOB_RESEND_MINUTES = env_int("JOB_RESEND_MINUTES", 15)
# The nightly recompute is spread over the workers in chunks of this many SIFs on the
# queue "calcs" (start workers with -Q celery,calcs).
CALCS_QUEUE = env_str("CALCS_QUEUE", "calcs")
RECOMPUTE_CHUNK_SIFS = env_int("RECOMPUTE_CHUNK_SIFS", 500)
# Evidence packs on a queue of their own, so a long pack never delays the scan or the
# recompute (workers: -Q celery,calcs,packs). At the soft limit a pack is stopped and
# marked failed with a plain message; the hard limit ends a build that does not stop.
PACKS_QUEUE = env_str("PACKS_QUEUE", "packs")
PACK_TIME_LIMIT_SECONDS = env_int("PACK_TIME_LIMIT_SECONDS", 900)
PACK_HARD_TIME_LIMIT_SECONDS = env_int("PACK_HARD_TIME_LIMIT_SECONDS",
                                       PACK_TIME_LIMIT_SECONDS + 60)
# A pack is built in sections of this many SIFs, in parallel on the packs workers.
PACK_SECTION_SIFS = env_int("PACK_SECTION_SIFS", 50)
CELERY_TASK_ROUTES = {"register.evidence_pack": {"queue": PACKS_QUEUE}}
CELERY_BEAT_SCHEDULE = {
    "due-date-scan": {
        "task": "register.scan",
        "schedule": SCAN_PERIOD_SECONDS,
        "options": {"expires": max(SCAN_PERIOD_SECONDS - 5, 1)},
    },
    "nightly-recompute": {
        "task": "calcs.recompute_all",
        "schedule": __import__("celery.schedules", fromlist=["crontab"]).crontab(
            minute=0, hour=RECOMPUTE_HOUR_UTC),
    },
    "chain-anchor": {"task": "register.chain_anchor", "schedule": 3600,
                     "options": {"expires": 3000}},
    "old-export-files": {"task": "register.remove_old_exports", "schedule": 6 * 3600,
                         "options": {"expires": 3600}},
    # Exports, imports and packs left "running" by a worker that is gone are failed;
    # exports and imports still queued long after they were asked for are sent again.
    "stopped-jobs": {"task": "register.sweep_stopped_jobs", "schedule": JOB_SWEEP_SECONDS,
                     "options": {"expires": max(JOB_SWEEP_SECONDS - 5, 1)}},
}

# --- REST framework ----------------------------------------------------------------
REST_FRAMEWORK = {
    # Token first, so a request without credentials is answered 401 (with a
    # WWW-Authenticate header), not 403.
    "DEFAULT_AUTHENTICATION_CLASSES": [
        "register.api.authentication.ExpiringTokenAuthentication",
        "rest_framework.authentication.SessionAuthentication",
    ],
    "DEFAULT_PERMISSION_CLASSES": ["rest_framework.permissions.IsAuthenticated"],
    "DEFAULT_PAGINATION_CLASS": "rest_framework.pagination.PageNumberPagination",
    "PAGE_SIZE": 50,
    "DEFAULT_FILTER_BACKENDS": ["django_filters.rest_framework.DjangoFilterBackend"],
    # JSON bodies nested too deeply or holding NaN / Infinity: 400 naming the field.
    "DEFAULT_PARSER_CLASSES": ["register.api.parsers.LedgerJSONParser",
                               "rest_framework.parsers.FormParser",
                               "rest_framework.parsers.MultiPartParser"],
    "DEFAULT_SCHEMA_CLASS": "drf_spectacular.openapi.AutoSchema",
    "EXCEPTION_HANDLER": "register.api.views.exception_handler",
    "DEFAULT_THROTTLE_CLASSES": ["rest_framework.throttling.AnonRateThrottle"],
    # Counted in the default cache (CACHES); "login" guards POST /api/token/ per address.
    "DEFAULT_THROTTLE_RATES": {
        "anon": env_str("API_ANON_RATE", "120/min"),
        "login": env_str("API_LOGIN_RATE", "10/min"),
    },
}
SPECTACULAR_SETTINGS = {
    "TITLE": "SIF Ledger API",
    "DESCRIPTION": "Register of safety instrumented functions. Results support, and do not "
    "replace, a functional safety assessment by competent persons under IEC 61511 and "
    "local regulations.",
    "VERSION": "0.1.0",
    "SERVE_PERMISSIONS": ["rest_framework.permissions.IsAuthenticated"],
    "COMPONENT_SPLIT_REQUEST": True,
    # Swagger UI files are served by the app itself (no CDN needed).
    "SWAGGER_UI_DIST": "/api/docs/assets",
    "SWAGGER_UI_FAVICON_HREF": "/api/docs/assets/favicon-32x32.png",
    "ENUM_NAME_OVERRIDES": {
        "VerdictEnum": "register.choices.Verdict",
        "TestKindEnum": "register.choices.TestKind",
        "ModifierKindEnum": "register.choices.ModifierKind",
        "NotificationKindEnum": "register.choices.NotificationKind",
        "PlanKindEnum": [("full", "Full proof test"), ("partial", "Partial test")],
    },
}

LOGGING = {
    "version": 1,
    "disable_existing_loggers": False,
    "handlers": {"console": {"class": "logging.StreamHandler"}},
    "root": {"handlers": ["console"], "level": env_str("LOG_LEVEL", "INFO")},
    "loggers": {"django.db.backends": {"level": "INFO"}},
}

# The state-change rows' one-per-change constraint treats an empty due date as a value
# (nulls not distinct); SQLite (the demo) cannot express that, PostgreSQL enforces it, and
# the scan compares with each plan's last row before writing on every database.
SILENCED_SYSTEM_CHECKS = ["models.W047"]

# The cache (field statistics, charts, API throttles, the wrong-password lock when
# confirming): shared by every process. On Redis when CACHE_URL is set (production sets
# it); otherwise Django's database cache (table CACHE_TABLE, made by ``createcachetable
# --database cache`` wherever migrate runs) on a connection of its own, alias "cache",
# outside the request's transaction: a count written while a request fails (a wrong
# password refused inside the signing's transaction) must stay. Its database is the
# register's on PostgreSQL; beside it, a file of its own, on SQLite (one writer per file:
# a request holding the register's write lock must not wait for its own cache).
CACHE_TABLE = env_str("CACHE_TABLE", "sif_ledger_cache")
if env_str("CACHE_URL"):
    CACHES = {"default": {"BACKEND": "django.core.cache.backends.redis.RedisCache",
                          "LOCATION": env_str("CACHE_URL"), "KEY_PREFIX": "sif-ledger"}}
else:
    CACHES = {"default": {"BACKEND": "django.core.cache.backends.db.DatabaseCache",
                          "LOCATION": CACHE_TABLE, "KEY_PREFIX": "sif-ledger"}}
    if DATABASES["default"]["ENGINE"].endswith("sqlite3"):
        DATABASES["cache"] = {"ENGINE": "django.db.backends.sqlite3",
                              "NAME": str(VAR_DIR / "cache.sqlite3"),
                              "OPTIONS": {"timeout": 20}}
    else:
        DATABASES["cache"] = {**DATABASES["default"], "ENGINE": "django.db.backends.postgresql",
                              "ATOMIC_REQUESTS": False, "TEST": {"MIRROR": "default"}}
    DATABASE_ROUTERS = ["config.cache_router.CacheRouter"]

# --- Browser hardening ---------------------------------------------------------------
# Content-Security-Policy (django-csp 4): scripts and styles only from this site's own
# files, no inline code anywhere, no framing. Pages that need more widen it for themselves
# (the API documentation: data: images in its stylesheet). Then Cache-Control: private,
# no-store on every response to a signed-in user (register/middleware_security.py).
MIDDLEWARE.insert(MIDDLEWARE.index("django.middleware.security.SecurityMiddleware") + 1,
                  "csp.middleware.CSPMiddleware")
MIDDLEWARE.insert(MIDDLEWARE.index("django.contrib.auth.middleware.AuthenticationMiddleware")
                  + 1, "register.middleware_security.NoStoreWhenSignedIn")
CONTENT_SECURITY_POLICY = {
    "DIRECTIVES": {
        "default-src": ["'self'"],
        "script-src": ["'self'"],
        "style-src": ["'self'"],
        "img-src": ["'self'"],
        "object-src": ["'none'"],
        "base-uri": ["'self'"],
        "form-action": ["'self'"],
        "frame-ancestors": ["'none'"],
    },
}

# --- Sign-in and credentials (register/accounts/signin.py, register/api/authentication.py)
# SIGNIN_MAX_FAILURES failed sign-ins lock one user name from one address (other users, and
# the same user from another address, are unaffected) for SIGNIN_LOCK_MINUTES after the last
# failure. django-axes counts them in the database, so every web process shares the count;
# it covers the sign-in page, the admin's and POST /api/token/. The admin lists the locks
# (Axes: access attempts); deleting one unlocks at once.
INSTALLED_APPS += ["axes"]
MIDDLEWARE += ["axes.middleware.AxesMiddleware"]
AUTHENTICATION_BACKENDS = ["axes.backends.AxesStandaloneBackend",
                           "django.contrib.auth.backends.ModelBackend"]
AXES_HANDLER = "axes.handlers.database.AxesDatabaseHandler"
AXES_FAILURE_LIMIT = env_int("SIGNIN_MAX_FAILURES", 5)
AXES_COOLOFF_TIME = __import__("datetime").timedelta(minutes=env_int("SIGNIN_LOCK_MINUTES", 15))
AXES_LOCKOUT_PARAMETERS = [["username", "ip_address"]]
AXES_RESET_ON_SUCCESS = True
AXES_RESET_COOL_OFF_ON_FAILURE_DURING_LOCKOUT = False  # the stated end of a lock holds
AXES_LOCKOUT_CALLABLE = "register.accounts.signin.locked_out"
# Its start-up banner and per-attempt lines only in production (production.py), not on the
# demo's or the commands' output.
AXES_VERBOSE = False
# The client's address is REMOTE_ADDR, or X-Forwarded-For when REMOTE_ADDR is one of these
# proxies (which must set that header itself, as deploy/Caddyfile does).
TRUSTED_PROXIES = env_list("TRUSTED_PROXIES")
AXES_CLIENT_IP_CALLABLE = "register.accounts.signin.client_address"
# DRF's throttles read the same address: behind the proxy, its one X-Forwarded-For entry.
REST_FRAMEWORK["NUM_PROXIES"] = 1 if TRUSTED_PROXIES else None
# Password-reset requests per address (DRF's throttle, counted in the cache).
REST_FRAMEWORK["DEFAULT_THROTTLE_RATES"]["password_reset"] = env_str(
    "PASSWORD_RESET_RATE", "5/hour")
# An API token lasts API_TOKEN_DAYS from its issue; a password change revokes the user's.
API_TOKEN_DAYS = env_int("API_TOKEN_DAYS", 30)
# A signing grant (POST /api/signing-grant/ with the password) lets the bulk API sign for
# SIGNING_GRANT_MINUTES without the password in each request (register/reauth.py); 0: off.
SIGNING_GRANT_MINUTES = env_int("SIGNING_GRANT_MINUTES", 10)
# A signed-in session ends after SESSION_IDLE_MINUTES without a request.
SESSION_COOKIE_AGE = env_int("SESSION_IDLE_MINUTES", 60) * 60
SESSION_SAVE_EVERY_REQUEST = True
