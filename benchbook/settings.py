"""Settings, read from the environment once, here.

With nothing set, the *embedded default* runs on one machine with no server
installed: SQLite and Celery's filesystem broker under ``var/``. Production and CI set
``DATABASE_URL`` (PostgreSQL) and ``CELERY_BROKER_URL`` (Redis).
"""

import os
from pathlib import Path

import dj_database_url
from django.core.exceptions import ImproperlyConfigured

BASE_DIR = Path(__file__).resolve().parent.parent
VAR_DIR = Path(os.environ.get("BENCHBOOK_VAR", BASE_DIR / "var"))


def _flag(name, default=False):
    return os.environ.get(name, str(default)).lower() in ("1", "true", "yes", "on")


DEBUG = _flag("DEBUG", False)
SECRET_KEY = os.environ.get("SECRET_KEY", "")
if not SECRET_KEY:
    if not DEBUG:
        # A key everyone can read would let anyone forge sessions and CSRF tokens.
        raise ImproperlyConfigured(
            "SECRET_KEY is not set: set it to a long random string (for example the output "
            "of python -c 'import secrets; print(secrets.token_urlsafe(50))'), "
            "or set DEBUG=true on a development machine"
        )
    SECRET_KEY = "benchbook-debug-only-key-never-for-production"
ALLOWED_HOSTS = [
    h for h in os.environ.get("ALLOWED_HOSTS", "127.0.0.1,localhost,testserver").split(",") if h
]

# HTTPS behind a proxy (README, "Production"). Off by default: the embedded default and
# the tests serve plain HTTP on 127.0.0.1.
SECURE_SSL_REDIRECT = _flag("SECURE_SSL_REDIRECT", False)
SESSION_COOKIE_SECURE = _flag("SESSION_COOKIE_SECURE", False)
CSRF_COOKIE_SECURE = _flag("CSRF_COOKIE_SECURE", False)
SECURE_HSTS_SECONDS = int(os.environ.get("SECURE_HSTS_SECONDS", 0))
SECURE_HSTS_INCLUDE_SUBDOMAINS = _flag("SECURE_HSTS_INCLUDE_SUBDOMAINS", False)
SECURE_HSTS_PRELOAD = _flag("SECURE_HSTS_PRELOAD", False)
# "HTTP_X_FORWARDED_PROTO=https": the header the proxy sets, and the value meaning HTTPS.
# Only behind a proxy that overwrites this header on every request.
if os.environ.get("SECURE_PROXY_SSL_HEADER"):
    _header, _, _value = os.environ["SECURE_PROXY_SSL_HEADER"].partition("=")
    if not _header or not _value:
        raise ImproperlyConfigured(
            "SECURE_PROXY_SSL_HEADER must read HEADER=value, e.g. HTTP_X_FORWARDED_PROTO=https"
        )
    SECURE_PROXY_SSL_HEADER = (_header.strip(), _value.strip())
CSRF_TRUSTED_ORIGINS = [o for o in os.environ.get("CSRF_TRUSTED_ORIGINS", "").split(",") if o]

INSTALLED_APPS = [
    "django.contrib.admin",
    "django.contrib.auth",
    "django.contrib.contenttypes",
    "django.contrib.sessions",
    "django.contrib.messages",
    "django.contrib.staticfiles",
    "rest_framework",
    "drf_spectacular",
    "drf_spectacular_sidecar",
    "evaluation",
    "releases",
    "frontend",
]

MIDDLEWARE = [
    "django.middleware.security.SecurityMiddleware",
    "whitenoise.middleware.WhiteNoiseMiddleware",
    "django.contrib.sessions.middleware.SessionMiddleware",
    "django.middleware.common.CommonMiddleware",
    "django.middleware.csrf.CsrfViewMiddleware",
    "django.contrib.auth.middleware.AuthenticationMiddleware",
    "django.contrib.messages.middleware.MessageMiddleware",
    # After authentication (its page shows the navigation), before any view and the
    # CSRF check read the body.
    "frontend.middleware.UploadLimitMiddleware",
    "django.middleware.clickjacking.XFrameOptionsMiddleware",
]

ROOT_URLCONF = "benchbook.urls"
WSGI_APPLICATION = "benchbook.wsgi.application"

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
            ]
        },
    }
]

VAR_DIR.mkdir(parents=True, exist_ok=True)
_default_db = f"sqlite:///{VAR_DIR / 'benchbook.sqlite3'}"
DATABASES = {
    "default": dj_database_url.parse(
        os.environ.get("DATABASE_URL", _default_db),
        conn_max_age=60,
        # A persistent connection is checked before each request reuses it, so a restarted
        # database costs no failed request.
        conn_health_checks=True,
    )
}
if DATABASES["default"]["ENGINE"].endswith("sqlite3"):
    # A file, not memory, so a worker process can share the test database too. The web
    # server and the worker write concurrently: write-ahead logging lets readers go on,
    # and IMMEDIATE transactions take the write lock up front, so they wait (up to the
    # timeout) instead of failing with "database is locked" when upgrading a read.
    DATABASES["default"]["TEST"] = {"NAME": str(VAR_DIR / "test-benchbook.sqlite3")}
    DATABASES["default"]["OPTIONS"] = {
        "timeout": 30,
        "transaction_mode": "IMMEDIATE",
        "init_command": "PRAGMA journal_mode=WAL; PRAGMA synchronous=NORMAL;",
    }
    DATABASES["default"]["CONN_MAX_AGE"] = 0

DEFAULT_AUTO_FIELD = "django.db.models.BigAutoField"
AUTH_PASSWORD_VALIDATORS = [
    {"NAME": "django.contrib.auth.password_validation.MinimumLengthValidator"},
]
LOGIN_URL = "login"
LOGIN_REDIRECT_URL = "/"
LOGOUT_REDIRECT_URL = "login"

LANGUAGE_CODE = "en-gb"
TIME_ZONE = "UTC"
USE_I18N = False
USE_TZ = True

STATIC_URL = "static/"
STATIC_ROOT = VAR_DIR / "static"
STATIC_ROOT.mkdir(exist_ok=True)  # whitenoise looks for it at start-up
MEDIA_ROOT = Path(os.environ.get("MEDIA_ROOT", VAR_DIR / "media"))
MEDIA_URL = "media/"
STORAGES = {
    "default": {"BACKEND": "django.core.files.storage.FileSystemStorage"},
    "staticfiles": {"BACKEND": "whitenoise.storage.CompressedStaticFilesStorage"},
}

# Uploads are streamed to disk past 2.5 MB, never held whole in the web process.
FILE_UPLOAD_MAX_MEMORY_SIZE = 2_621_440
FILE_UPLOAD_TEMP_DIR = None
BENCHBOOK_MAX_UPLOAD_BYTES = int(os.environ.get("BENCHBOOK_MAX_UPLOAD_BYTES", 512 * 1024 * 1024))
# One image file of a split (images are optional; see evaluation/images.py).
BENCHBOOK_MAX_IMAGE_BYTES = int(os.environ.get("BENCHBOOK_MAX_IMAGE_BYTES", 25 * 1024 * 1024))
DATA_UPLOAD_MAX_MEMORY_SIZE = 10 * 1024 * 1024
# Prediction files up to this size are loaded against the split inside the upload
# request and refused with the engine's message (file, record, field); larger ones are
# checked by the worker.
BENCHBOOK_INLINE_VALIDATION_BYTES = int(
    os.environ.get("BENCHBOOK_INLINE_VALIDATION_BYTES", 16 * 1024 * 1024)
)
# Parsed-input cache of the engine (columnar .npz), shared by workers on one machine.
BENCHBOOK_ENGINE_CACHE = Path(os.environ.get("BENCHBOOK_ENGINE_CACHE", VAR_DIR / "engine-cache"))
# Evaluations over BENCHBOOK_SHARD_ABOVE images x detections are scored in shards of
# BENCHBOOK_SHARD_IMAGES images by every worker (evaluation/sharding.py).
BENCHBOOK_SHARD_ABOVE = float(os.environ.get("BENCHBOOK_SHARD_ABOVE", 5e9))
BENCHBOOK_SHARD_IMAGES = int(os.environ.get("BENCHBOOK_SHARD_IMAGES", 5000))
# After the shards, the classes are scored in at most this many groups of consecutive
# classes, one task each, on every worker (evaluation/class_groups.py).
BENCHBOOK_CLASS_GROUPS = int(os.environ.get("BENCHBOOK_CLASS_GROUPS", 8))
# The per-image list's leave-one-out file (evaluation/image_loo.py) is computed and
# stored with a result only up to this size (keys x classes x (1 + images) x 8 bytes);
# over it the list computes on request.
BENCHBOOK_LOO_MAX_BYTES = int(os.environ.get("BENCHBOOK_LOO_MAX_BYTES", 256 * 1024 * 1024))
BENCHBOOK_PROTOCOLS = ("coco", "voc", "recall40")
# Paired bootstrap behind "no significant drop" rules: replicates and seed (reproducible).
BENCHBOOK_BOOTSTRAP_RESAMPLES = int(os.environ.get("BENCHBOOK_BOOTSTRAP_RESAMPLES", 1000))
BENCHBOOK_BOOTSTRAP_SEED = 0

# Celery: filesystem broker by default, Redis when CELERY_BROKER_URL says so.
CELERY_BROKER_URL = os.environ.get("CELERY_BROKER_URL", "filesystem://")
if CELERY_BROKER_URL.startswith("filesystem://"):
    _broker_dir = VAR_DIR / "broker"
    for _folder in ("queue", "processed", "control"):  # kombu expects the folders to exist
        (_broker_dir / _folder).mkdir(parents=True, exist_ok=True)
    CELERY_BROKER_TRANSPORT_OPTIONS = {
        "data_folder_in": str(_broker_dir / "queue"),
        "data_folder_out": str(_broker_dir / "queue"),
        "data_folder_processed": str(_broker_dir / "processed"),
        "control_folder": str(_broker_dir / "control"),
        "store_processed": False,
    }
# Chords (image shards, evaluation/sharding.py) need a result backend: Redis beside a
# Redis broker, files under VAR_DIR beside the embedded filesystem broker.
CELERY_RESULT_BACKEND = os.environ.get(
    "CELERY_RESULT_BACKEND",
    CELERY_BROKER_URL
    if CELERY_BROKER_URL.startswith("redis")
    else f"file://{(VAR_DIR / 'results').as_posix()}",
)
if CELERY_RESULT_BACKEND.startswith("file://"):
    Path(CELERY_RESULT_BACKEND.removeprefix("file://")).mkdir(parents=True, exist_ok=True)
CELERY_RESULT_EXPIRES = 24 * 3600
CELERY_TASK_DEFAULT_QUEUE = os.environ.get("BENCHBOOK_QUEUE", "benchbook")
CELERY_TASK_ACKS_LATE = True
CELERY_TASK_REJECT_ON_WORKER_LOST = True
CELERY_WORKER_PREFETCH_MULTIPLIER = 1
CELERY_TASK_IGNORE_RESULT = True
CELERY_TASK_SERIALIZER = "json"
CELERY_ACCEPT_CONTENT = ["json"]
CELERY_TASK_ALWAYS_EAGER = _flag("BENCHBOOK_EAGER_TASKS", False)
CELERY_TASK_EAGER_PROPAGATES = True
CELERY_BEAT_SCHEDULE_FILENAME = str(VAR_DIR / "celerybeat-schedule")
# The job lifecycle (evaluation/jobs.py). A scoring worker renews its lease every third
# of BENCHBOOK_LEASE_SECONDS; the sweep (every BENCHBOOK_SWEEP_SECONDS) requeues a running
# evaluation whose lease ran out, so a killed worker's evaluation is scored again within
# lease + sweep seconds (90 s by default), and sends again one queued for longer than
# BENCHBOOK_QUEUED_GRACE_SECONDS (the broker lost it). Database errors are retried with
# back-off for BENCHBOOK_DB_RETRY_SECONDS (a longer outage: the sweep takes over).
BENCHBOOK_LEASE_SECONDS = float(os.environ.get("BENCHBOOK_LEASE_SECONDS", 60))
BENCHBOOK_SWEEP_SECONDS = float(os.environ.get("BENCHBOOK_SWEEP_SECONDS", 30))
BENCHBOOK_QUEUED_GRACE_SECONDS = float(os.environ.get("BENCHBOOK_QUEUED_GRACE_SECONDS", 120))
BENCHBOOK_DB_RETRY_SECONDS = float(os.environ.get("BENCHBOOK_DB_RETRY_SECONDS", 300))
BENCHBOOK_MAX_ATTEMPTS = 3
# Judging (releases/verdicts.py): an error while judging is retried with back-off
# (RETRY_SECONDS, doubling: 10, 20, 40, 80 s); only after the last retry is it recorded
# as a final *incomplete* judgement naming the error. Meanwhile the version reads judging.
BENCHBOOK_JUDGE_RETRIES = int(os.environ.get("BENCHBOOK_JUDGE_RETRIES", 4))
BENCHBOOK_JUDGE_RETRY_SECONDS = float(os.environ.get("BENCHBOOK_JUDGE_RETRY_SECONDS", 10))
CELERY_BEAT_SCHEDULE = {
    "requeue-stalled-evaluations": {
        "task": "evaluation.tasks.sweep",
        "schedule": BENCHBOOK_SWEEP_SECONDS,
    },
    "requeue-lost-judging": {"task": "releases.tasks.sweep", "schedule": 60.0},
    # The full audit verification the audit page shows (releases/audit_check.py).
    "verify-audit-trail": {
        "task": "releases.tasks.verify_audit",
        "schedule": float(os.environ.get("BENCHBOOK_AUDIT_VERIFY_SECONDS", 3600)),
    },
}

# After each audit event, "id hash" is appended here (a file outside the database, on
# storage the application cannot rewrite, or shipped to an external log): the copy of
# the chain's head that ``verify_audit --head`` checks. Unset: the log line only.
BENCHBOOK_AUDIT_HEAD_FILE = os.environ.get("BENCHBOOK_AUDIT_HEAD_FILE") or None
# PostgreSQL: the role the web processes and workers log in as (owns nothing). Set it
# where migrate runs (as the owner) and every migrate ends by granting that role its
# privileges on every table, new ones included (releases/db_roles.py).
BENCHBOOK_DB_APP_ROLE = os.environ.get("BENCHBOOK_DB_APP_ROLE", "")

# Notifications (releases/notify.py) are their own task, queued after a judgement: one
# webhook POST per run with a short timeout, later attempts queued with a countdown, so a
# webhook that never answers holds a worker for BENCHBOOK_WEBHOOK_TIMEOUT_SECONDS at most.
# BENCHBOOK_NOTIFY_QUEUE routes them to a queue of their own (run a worker for it).
BENCHBOOK_WEBHOOK_ATTEMPTS = 4
BENCHBOOK_WEBHOOK_BACKOFF_SECONDS = 2.0
BENCHBOOK_WEBHOOK_TIMEOUT_SECONDS = float(os.environ.get("BENCHBOOK_WEBHOOK_TIMEOUT_SECONDS", 5))
BENCHBOOK_NOTIFY_QUEUE = os.environ.get("BENCHBOOK_NOTIFY_QUEUE", "")
# Each notification is recorded (releases.Notification); one still pending this long
# after it was due (its message lost, its worker killed) is sent again by the sweep.
BENCHBOOK_NOTIFY_GRACE_SECONDS = float(os.environ.get("BENCHBOOK_NOTIFY_GRACE_SECONDS", 60))
CELERY_BEAT_SCHEDULE["resend-notifications"] = {
    "task": "releases.tasks.resend_notifications",
    "schedule": 60.0,
}
if BENCHBOOK_NOTIFY_QUEUE:
    CELERY_TASK_ROUTES = {"releases.tasks.notify": {"queue": BENCHBOOK_NOTIFY_QUEUE}}
DEFAULT_FROM_EMAIL = os.environ.get("DEFAULT_FROM_EMAIL", "benchbook@localhost")
EMAIL_BACKEND = os.environ.get("EMAIL_BACKEND", "django.core.mail.backends.console.EmailBackend")
EMAIL_TIMEOUT = 10  # seconds per SMTP operation; Django waits forever by default

# The API (releases/api): tokens for pipelines, the session for the browser.
REST_FRAMEWORK = {
    "DEFAULT_AUTHENTICATION_CLASSES": [
        "releases.api.auth.TokenAuthentication",
        "rest_framework.authentication.SessionAuthentication",
    ],
    "DEFAULT_PERMISSION_CLASSES": ["rest_framework.permissions.IsAuthenticated"],
    "DEFAULT_RENDERER_CLASSES": ["rest_framework.renderers.JSONRenderer"],
    "DEFAULT_PARSER_CLASSES": [
        "releases.api.parsers.JSONParser",
        "rest_framework.parsers.MultiPartParser",
        "rest_framework.parsers.FormParser",
    ],
    "DEFAULT_PAGINATION_CLASS": "releases.api.pagination.Pages",
    "DEFAULT_THROTTLE_CLASSES": ["releases.api.auth.TokenRateThrottle"],
    "EXCEPTION_HANDLER": "releases.api.errors.handle",
    "DEFAULT_SCHEMA_CLASS": "drf_spectacular.openapi.AutoSchema",
    "UNAUTHENTICATED_USER": "django.contrib.auth.models.AnonymousUser",
}
# Requests per token (DRF rate syntax); the browser session is not limited.
BENCHBOOK_TOKEN_RATE = os.environ.get("BENCHBOOK_TOKEN_RATE", "1200/minute")
SPECTACULAR_SETTINGS = {
    "TITLE": "Benchbook API",
    "DESCRIPTION": "Upload detector predictions, follow their scoring, read scorecards, "
    "verdicts and evidence, and record release decisions.",
    "VERSION": "1",
    "SERVE_INCLUDE_SCHEMA": False,
    "SWAGGER_UI_DIST": "SIDECAR",
    "SWAGGER_UI_FAVICON_HREF": "SIDECAR",
    "COMPONENT_SPLIT_REQUEST": True,
    "SCHEMA_PATH_PREFIX": r"/api/v1",  # tags from the resource: detectors, versions, …
    # one name for the drop/reject set, which evaluations and suites share
    "ENUM_NAME_OVERRIDES": {"UnknownClassesEnum": "evaluation.models.Evaluation.UnknownClasses"},
}
# Throttle counters: shared by every web process when BENCHBOOK_CACHE_URL names a Redis.
if os.environ.get("BENCHBOOK_CACHE_URL"):
    CACHES = {
        "default": {
            "BACKEND": "django.core.cache.backends.redis.RedisCache",
            "LOCATION": os.environ["BENCHBOOK_CACHE_URL"],
        }
    }

LOGGING = {
    "version": 1,
    "disable_existing_loggers": False,
    "handlers": {"console": {"class": "logging.StreamHandler"}},
    "root": {"handlers": ["console"], "level": os.environ.get("LOG_LEVEL", "INFO")},
    # One line per audit event: shipped to an external log only when the operator asks.
    "loggers": {
        "releases.audit.head": {
            "level": os.environ.get("BENCHBOOK_AUDIT_HEAD_LOG_LEVEL", "WARNING")
        }
    },
}
