"""Production settings: refuse to start without a real secret and hosts."""

from django.core.exceptions import ImproperlyConfigured

from config.settings.base import *  # noqa: F403
from config.settings.base import SECRET_KEY
from config.settings.env import env_bool, env_int, env_list, env_str

DEBUG = False
if not SECRET_KEY or SECRET_KEY.startswith("dev-only") or len(SECRET_KEY) < 50:
    raise ImproperlyConfigured("SECRET_KEY must be set to a random value of 50+ characters")
CHAIN_KEY = env_str("CHAIN_KEY")
if not CHAIN_KEY or len(CHAIN_KEY) < 32:
    raise ImproperlyConfigured("CHAIN_KEY must be set to a random value of 32+ characters")
ALLOWED_HOSTS = env_list("ALLOWED_HOSTS")
if not ALLOWED_HOSTS:
    raise ImproperlyConfigured("ALLOWED_HOSTS must list the host names this site answers to")

# Safe only behind the proxy, the one way in: Caddy (deploy/Caddyfile) sets the header itself
# and drops a client's; gunicorn is not published (docker-compose.yml).
SECURE_PROXY_SSL_HEADER = ("HTTP_X_FORWARDED_PROTO", "https")
SECURE_SSL_REDIRECT = env_bool("SECURE_SSL_REDIRECT", True)
SESSION_COOKIE_SECURE = True
CSRF_COOKIE_SECURE = True
SESSION_COOKIE_HTTPONLY = True
CSRF_COOKIE_HTTPONLY = True
SESSION_COOKIE_SAMESITE = "Lax"
SECURE_HSTS_SECONDS = env_int("SECURE_HSTS_SECONDS", 31536000)
SECURE_HSTS_INCLUDE_SUBDOMAINS = True
SECURE_HSTS_PRELOAD = True
SECURE_CONTENT_TYPE_NOSNIFF = True
SECURE_REFERRER_POLICY = "same-origin"
X_FRAME_OPTIONS = "DENY"
STORAGES = {
    "default": {"BACKEND": "django.core.files.storage.FileSystemStorage"},
    "staticfiles": {"BACKEND": "whitenoise.storage.CompressedManifestStaticFilesStorage"},
}

# One cache for every web and worker process (field statistics, API throttles).
CACHE_URL = env_str("CACHE_URL", "redis://127.0.0.1:6379/1")
CACHES = {"default": {"BACKEND": "django.core.cache.backends.redis.RedisCache",
                      "LOCATION": CACHE_URL, "KEY_PREFIX": "sif-ledger"}}

# Sign-in failures and locks in the log (django-axes).
AXES_VERBOSE = True
