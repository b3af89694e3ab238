"""labbook settings, read from the environment (DESIGN.md §4).

With no configuration it runs embedded: SQLite and stored files under ``LABBOOK_DATA_DIR``
(default ``./var``), Celery tasks executed eagerly in-process. ``DATABASE_URL`` switches to
PostgreSQL, ``CELERY_BROKER_URL`` (or ``REDIS_URL``) to Redis-backed workers.
"""

from __future__ import annotations

import os
import secrets
from pathlib import Path

from celery.schedules import crontab
from django.core.exceptions import ImproperlyConfigured

from labbook.core.env import database_from_url, env_bool, env_int, env_list, env_str

BASE_DIR = Path(__file__).resolve().parent.parent
DATA_DIR = Path(env_str("LABBOOK_DATA_DIR", str(BASE_DIR / "var"))).resolve()
DATA_DIR.mkdir(parents=True, exist_ok=True)


def _secret_key() -> str:
    """SECRET_KEY from the environment, else one generated once into the data dir."""
    configured = env_str("SECRET_KEY")
    if configured:
        return configured
    key_file = DATA_DIR / "secret_key"
    if key_file.exists():
        return key_file.read_text().strip()
    key = secrets.token_urlsafe(50)
    # O_EXCL: two processes starting at once must not end with different keys.
    try:
        fd = os.open(key_file, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        return key_file.read_text().strip()
    with os.fdopen(fd, "w") as handle:
        handle.write(key)
    return key


SECRET_KEY = _secret_key()
DEBUG = env_bool("DEBUG", False)
ALLOWED_HOSTS = env_list("ALLOWED_HOSTS", ["127.0.0.1", "localhost", "[::1]"])
CSRF_TRUSTED_ORIGINS = env_list("CSRF_TRUSTED_ORIGINS", [])

INSTALLED_APPS = [
    "django.contrib.admin",
    "django.contrib.auth",
    "django.contrib.contenttypes",
    "django.contrib.sessions",
    "django.contrib.messages",
    "whitenoise.runserver_nostatic",
    "django.contrib.staticfiles",
    "simple_history",
    "ninja",  # its Swagger UI files, served from our static files (no CDN)
    "labbook.core",
    "labbook.accounts",
    "labbook.instruments",
    "labbook.logbook",
    "labbook.samples",
    "labbook.tips",
    "labbook.datafiles",
    "labbook.provenance",
    "labbook.cryo",
    "labbook.web",
]

MIDDLEWARE = [
    "django.middleware.security.SecurityMiddleware",
    "whitenoise.middleware.WhiteNoiseMiddleware",
    "django.contrib.sessions.middleware.SessionMiddleware",
    "django.middleware.common.CommonMiddleware",
    "django.middleware.csrf.CsrfViewMiddleware",
    "django.contrib.auth.middleware.AuthenticationMiddleware",
    "labbook.accounts.middleware.LabLoginRequiredMiddleware",
    "django.contrib.messages.middleware.MessageMiddleware",
    "django.middleware.clickjacking.XFrameOptionsMiddleware",
    "simple_history.middleware.HistoryRequestMiddleware",
]

ROOT_URLCONF = "labbook.urls"
WSGI_APPLICATION = "labbook.wsgi.application"

TEMPLATES = [
    {
        "BACKEND": "django.template.backends.django.DjangoTemplates",
        "DIRS": [],
        "APP_DIRS": True,
        "OPTIONS": {
            "context_processors": [
                "django.template.context_processors.request",
                "django.contrib.auth.context_processors.auth",
                "django.contrib.messages.context_processors.messages",
                "labbook.web.context_processors.lab",
            ],
        },
    },
]

# --- database -------------------------------------------------------------------------------
DATABASE_URL = env_str("DATABASE_URL")
if DATABASE_URL:
    DATABASES = {
        "default": database_from_url(DATABASE_URL, conn_max_age=env_int("DB_CONN_MAX_AGE", 60))
    }
else:
    DATABASES = {
        "default": {
            "ENGINE": "django.db.backends.sqlite3",
            "NAME": str(DATA_DIR / "labbook.sqlite3"),
            # WAL lets the web process read while a command writes a year of readings.
            "OPTIONS": {"init_command": "PRAGMA journal_mode=WAL;", "timeout": 20},
            # A file, not memory, so a server or worker process started by a test can share it
            # (the test hands it the path); one per test run, so two runs never collide.
            "TEST": {"NAME": str(DATA_DIR / f"test-labbook-{os.getpid()}.sqlite3")},
        }
    }
    # The search's covering indexes INCLUDE columns that only PostgreSQL keeps; SQLite builds
    # them on their key columns, which is all an embedded lab of this size needs.
    SILENCED_SYSTEM_CHECKS = ["models.W040"]
DEFAULT_AUTO_FIELD = "django.db.models.BigAutoField"

# --- auth -----------------------------------------------------------------------------------
AUTH_PASSWORD_VALIDATORS = [
    {"NAME": "django.contrib.auth.password_validation.UserAttributeSimilarityValidator"},
    {"NAME": "django.contrib.auth.password_validation.MinimumLengthValidator"},
    {"NAME": "django.contrib.auth.password_validation.CommonPasswordValidator"},
    {"NAME": "django.contrib.auth.password_validation.NumericPasswordValidator"},
]
LOGIN_URL = "login"
LOGIN_REDIRECT_URL = "dashboard"
LOGOUT_REDIRECT_URL = "login"

# --- time -----------------------------------------------------------------------------------
LANGUAGE_CODE = "en-gb"
USE_I18N = False
USE_TZ = True
TIME_ZONE = env_str("TIME_ZONE", "UTC")  # the lab's zone: storage stays UTC, pages show this

# --- files ----------------------------------------------------------------------------------
STATIC_URL = "/static/"
STATIC_ROOT = DATA_DIR / "static"
STATIC_ROOT.mkdir(exist_ok=True)
MEDIA_ROOT = Path(env_str("LABBOOK_FILES_DIR", str(DATA_DIR / "files"))).resolve()
MEDIA_URL = "/media/"  # never served directly: files go through views that check login
STORAGES = {
    "default": {
        "BACKEND": env_str("LABBOOK_FILE_STORAGE", "django.core.files.storage.FileSystemStorage")
    },
    "staticfiles": {
        "BACKEND": "whitenoise.storage.CompressedManifestStaticFilesStorage"
        if not DEBUG
        else "django.contrib.staticfiles.storage.StaticFilesStorage"
    },
}
DATA_UPLOAD_MAX_MEMORY_SIZE = env_int("LABBOOK_MAX_FORM_BYTES", 10 * 1024 * 1024)
FILE_UPLOAD_MAX_MEMORY_SIZE = 4 * 1024 * 1024
LABBOOK_MAX_UPLOAD_BYTES = env_int("LABBOOK_MAX_UPLOAD_BYTES", 2 * 1024**3)

# --- security -------------------------------------------------------------------------------
# Behind a TLS-terminating reverse proxy set LABBOOK_HTTPS=true: secure cookies, HSTS and the
# redirect then apply. They stay off by default so the embedded demo works on plain http.
LABBOOK_HTTPS = env_bool("LABBOOK_HTTPS", False)
SESSION_COOKIE_SECURE = LABBOOK_HTTPS
CSRF_COOKIE_SECURE = LABBOOK_HTTPS
SECURE_SSL_REDIRECT = LABBOOK_HTTPS
SECURE_HSTS_SECONDS = env_int("SECURE_HSTS_SECONDS", 31536000 if LABBOOK_HTTPS else 0)
SECURE_HSTS_INCLUDE_SUBDOMAINS = LABBOOK_HTTPS
SECURE_HSTS_PRELOAD = env_bool("SECURE_HSTS_PRELOAD", LABBOOK_HTTPS)
if env_bool("LABBOOK_BEHIND_PROXY", LABBOOK_HTTPS):
    SECURE_PROXY_SSL_HEADER = ("HTTP_X_FORWARDED_PROTO", "https")
SECURE_REDIRECT_EXEMPT = [r"^healthz$"]
SESSION_COOKIE_HTTPONLY = True
SESSION_COOKIE_SAMESITE = "Lax"
CSRF_COOKIE_SAMESITE = "Lax"
X_FRAME_OPTIONS = "DENY"
SECURE_CONTENT_TYPE_NOSNIFF = True
SECURE_REFERRER_POLICY = "same-origin"

# --- Cache ----------------------------------------------------------------------------------
# Failed-login counts and rendered plots live here. Per process by default; production sets
# LABBOOK_CACHE_URL (e.g. redis://redis:6379/1, a database apart from the broker's) so that
# every web worker shares one count of failed logins.
LABBOOK_CACHE_URL = env_str("LABBOOK_CACHE_URL")
CACHES = {
    "default": (
        {
            "BACKEND": "django.core.cache.backends.redis.RedisCache",
            "LOCATION": LABBOOK_CACHE_URL,
            "KEY_PREFIX": "labbook",
        }
        if LABBOOK_CACHE_URL
        else {"BACKEND": "django.core.cache.backends.locmem.LocMemCache"}
    )
}

# --- Celery ---------------------------------------------------------------------------------
CELERY_BROKER_URL = env_str("CELERY_BROKER_URL") or env_str("REDIS_URL")
CELERY_RESULT_BACKEND = env_str("CELERY_RESULT_BACKEND") or (
    CELERY_BROKER_URL if CELERY_BROKER_URL.startswith(("redis://", "rediss://")) else ""
)
# Embedded mode: no broker configured, so every task runs in-process when it is queued.
CELERY_TASK_ALWAYS_EAGER = not CELERY_BROKER_URL
CELERY_TASK_EAGER_PROPAGATES = False
CELERY_TASK_DEFAULT_QUEUE = env_str("CELERY_TASK_DEFAULT_QUEUE", "labbook")
# A task is acknowledged only after it ran, so a killed worker's task is delivered again;
# tasks are written to be idempotent for that reason.
CELERY_TASK_ACKS_LATE = True
CELERY_TASK_REJECT_ON_WORKER_LOST = True
CELERY_WORKER_PREFETCH_MULTIPLIER = 1
CELERY_TASK_TIME_LIMIT = env_int("CELERY_TASK_TIME_LIMIT", 600)
CELERY_TASK_SOFT_TIME_LIMIT = CELERY_TASK_TIME_LIMIT - 30
CELERY_RESULT_EXPIRES = 24 * 3600
CELERY_BROKER_CONNECTION_RETRY_ON_STARTUP = True
#: The workers' CPU priority (a nice increment, 0–19; 0 leaves it). Processing is background
#: work: on a small lab server it must yield the cores to the pages and the API, or a burst of
#: uploads makes every search wait behind thumbnails (labbook/bench/load.py measures this).
LABBOOK_WORKER_NICE = env_int("LABBOOK_WORKER_NICE", 10)
# The dashboard's refill plan is made again at most this often (0: on every load); a logged
# refill or a changed cryostat or calendar makes a new one at once (labbook.cryo.queries).
LABBOOK_DASHBOARD_PLAN_SECONDS = env_int("LABBOOK_DASHBOARD_PLAN_SECONDS", 60)
# Redis redelivers an unacknowledged task after this long; longer than the longest task.
CELERY_BROKER_TRANSPORT_OPTIONS = {"visibility_timeout": CELERY_TASK_TIME_LIMIT + 300}
CELERY_TIMEZONE = "UTC"
CELERY_BEAT_SCHEDULE = {
    "sweep-pending-work": {
        "task": "labbook.core.tasks.sweep_pending_work",
        "schedule": env_int("LABBOOK_SWEEP_SECONDS", 300),
    },
    "verify-stored-files": {
        "task": "labbook.datafiles.tasks.verify_stored_files",
        "schedule": crontab(hour=2, minute=41, day_of_week="sun"),
    },
    "prune-finished-jobs": {
        "task": "labbook.core.tasks.prune_finished_jobs",
        "schedule": crontab(hour=3, minute=17),
    },
    "check-cryostat-alerts": {
        "task": "labbook.cryo.tasks.check_cryostat_alerts",
        "schedule": 15 * 60,
    },
}
# Pending work older than this is handed to a worker again by the sweep.
LABBOOK_SWEEP_AFTER_SECONDS = env_int("LABBOOK_SWEEP_AFTER_SECONDS", 120)

# --- email ----------------------------------------------------------------------------------
EMAIL_BACKEND = env_str("EMAIL_BACKEND", "django.core.mail.backends.console.EmailBackend")
DEFAULT_FROM_EMAIL = env_str("DEFAULT_FROM_EMAIL", "labbook@localhost")
SERVER_EMAIL = DEFAULT_FROM_EMAIL

# --- logging --------------------------------------------------------------------------------
LOGGING = {
    "version": 1,
    "disable_existing_loggers": False,
    "formatters": {"plain": {"format": "%(asctime)s %(levelname)s %(name)s: %(message)s"}},
    "handlers": {"console": {"class": "logging.StreamHandler", "formatter": "plain"}},
    "root": {"handlers": ["console"], "level": env_str("LOG_LEVEL", "INFO")},
    "loggers": {"django.db.backends": {"level": "WARNING"}},
}

LABBOOK_NAME = env_str("LABBOOK_NAME", "labbook")

if not DEBUG and SECRET_KEY.startswith("django-insecure"):
    raise ImproperlyConfigured("SECRET_KEY looks like a development key; set a real one")
