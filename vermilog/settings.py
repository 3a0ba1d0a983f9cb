"""Vermilog settings: one file, driven by environment variables.

Development defaults are safe to run on a laptop (DEBUG on, SQLite file in the project folder).
Production sets DEBUG=0, SECRET_KEY, ALLOWED_HOSTS and usually DATABASE_URL; then
`python manage.py check --deploy` is clean.
"""
import os
from pathlib import Path

import dj_database_url
from django.core.exceptions import ImproperlyConfigured

BASE_DIR = Path(__file__).resolve().parent.parent

_TRUE = {"1", "true", "yes", "on"}
_FALSE = {"0", "false", "no", "off", ""}


def env_bool(name: str, default: bool) -> bool:
    raw = os.environ.get(name)
    if raw is None:
        return default
    value = raw.strip().lower()
    if value in _TRUE:
        return True
    if value in _FALSE:
        return False
    raise ImproperlyConfigured(f"{name}={raw!r} is not a boolean; use 1/0, true/false, yes/no or on/off.")


def env_int(name: str, default: int) -> int:
    raw = os.environ.get(name)
    if raw is None:
        return default
    try:
        return int(raw)
    except ValueError:
        raise ImproperlyConfigured(f"{name}={raw!r} is not an integer.") from None


def env_list(name: str, default: list[str]) -> list[str]:
    raw = os.environ.get(name)
    if raw is None:
        return default
    return [item.strip() for item in raw.split(",") if item.strip()]


def env_path(name: str, default: Path) -> str:
    return os.environ.get(name) or str(default)


DEBUG = env_bool("DEBUG", True)

_DEV_SECRET = "vermilog-development-only-key-never-use-in-production"
SECRET_KEY = os.environ.get("SECRET_KEY", "")
if not SECRET_KEY:
    if not DEBUG:
        raise ImproperlyConfigured("SECRET_KEY must be set when DEBUG is off.")
    SECRET_KEY = _DEV_SECRET

ALLOWED_HOSTS = env_list("ALLOWED_HOSTS", ["127.0.0.1", "localhost"] if DEBUG else [])
CSRF_TRUSTED_ORIGINS = env_list("CSRF_TRUSTED_ORIGINS", [])

INSTALLED_APPS = [
    "django.contrib.admin",
    "django.contrib.auth",
    "django.contrib.contenttypes",
    "django.contrib.sessions",
    "django.contrib.messages",
    "whitenoise.runserver_nostatic",
    "django.contrib.staticfiles",
    "django_filters",
    # Before simple_history: Django runs the management command of the earliest app that has one, so
    # colonies' refusing clean_duplicate_history / clean_old_history replace the library's purges.
    "colonies",
    "experiments",
    "simple_history",
]

# Hides the history library's "revert" button; colonies.admin.HistoryAdmin also refuses the
# revert form itself, so this setting is not the only guard.
SIMPLE_HISTORY_REVERT_DISABLED = True

MIDDLEWARE = [
    "django.middleware.security.SecurityMiddleware",
    "whitenoise.middleware.WhiteNoiseMiddleware",
    "django.contrib.sessions.middleware.SessionMiddleware",
    "django.middleware.common.CommonMiddleware",
    "django.middleware.csrf.CsrfViewMiddleware",
    "django.contrib.auth.middleware.AuthenticationMiddleware",
    "django.contrib.auth.middleware.LoginRequiredMiddleware",
    "django.contrib.messages.middleware.MessageMiddleware",
    "django.middleware.clickjacking.XFrameOptionsMiddleware",
    # Puts request.user on every history row (who made the change).
    "simple_history.middleware.HistoryRequestMiddleware",
]

ROOT_URLCONF = "vermilog.urls"

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
                "colonies.roles.roles_context",
            ],
        },
    },
]

WSGI_APPLICATION = "vermilog.wsgi.application"

DATABASES = {
    "default": dj_database_url.parse(
        os.environ.get("DATABASE_URL", f"sqlite:///{BASE_DIR / 'vermilog.sqlite3'}"),
        conn_max_age=env_int("DB_CONN_MAX_AGE", 0),
    )
}
if DATABASES["default"]["ENGINE"] == "django.db.backends.sqlite3":
    # Same backend, with SQLite's real parameter limit and write-ahead logging (vermilog/sqlite3/base.py).
    DATABASES["default"]["ENGINE"] = "vermilog.sqlite3"
    # Several people save at once: every transaction takes the write lock when it begins (a
    # deferred one that reads first and then writes cannot wait for the lock and fails at once
    # with "database is locked"), and a writer waits up to SQLITE_BUSY_TIMEOUT_S for the one before.
    DATABASES["default"]["OPTIONS"] = {
        "transaction_mode": "IMMEDIATE",
        "timeout": env_int("SQLITE_BUSY_TIMEOUT_S", 20),
        **DATABASES["default"].get("OPTIONS", {}),
    }
    # Tests run on a file, as production does; the in-memory shared-cache database Django uses by
    # default for tests has table locks instead of WAL and hides what concurrent writers do.
    DATABASES["default"]["TEST"] = {"NAME": env_path("SQLITE_TEST_NAME", BASE_DIR / "test-vermilog.sqlite3")}
DEFAULT_AUTO_FIELD = "django.db.models.BigAutoField"
# History reasons in a text column: a reason of any length the forms allow (REASON_MAX_CHARS in
# colonies/models.py) plus a prefix such as "Cancelled: " fits on every database.
SIMPLE_HISTORY_HISTORY_CHANGE_REASON_USE_TEXT_FIELD = True

AUTH_PASSWORD_VALIDATORS = [
    {"NAME": "django.contrib.auth.password_validation.UserAttributeSimilarityValidator"},
    {"NAME": "django.contrib.auth.password_validation.MinimumLengthValidator"},
    {"NAME": "django.contrib.auth.password_validation.CommonPasswordValidator"},
    {"NAME": "django.contrib.auth.password_validation.NumericPasswordValidator"},
]

LOGIN_URL = "login"
LOGIN_REDIRECT_URL = "colonies:home"
LOGOUT_REDIRECT_URL = "login"

LANGUAGE_CODE = "en-gb"
TIME_ZONE = os.environ.get("TIME_ZONE", "UTC")
USE_I18N = True
USE_TZ = True  # who/when are stored in UTC and shown in TIME_ZONE

STATIC_URL = "static/"
STATICFILES_DIRS = [BASE_DIR / "static"]
STATIC_ROOT = BASE_DIR / "staticfiles"
STORAGES = {
    "default": {"BACKEND": "django.core.files.storage.FileSystemStorage"},
    "staticfiles": {
        "BACKEND": (
            "django.contrib.staticfiles.storage.StaticFilesStorage"
            if DEBUG
            else "whitenoise.storage.CompressedManifestStaticFilesStorage"
        )
    },
}
# Rendered colony-health plots (colonies/health_views.py); keys carry a records version, so a new
# record makes a new key. Per-process memory suits one server process; a deployment with several
# processes can point this at a shared backend.
CACHES = {
    "default": {
        "BACKEND": "django.core.cache.backends.locmem.LocMemCache",
        "LOCATION": "vermilog-plots",
        "OPTIONS": {"MAX_ENTRIES": env_int("PLOT_CACHE_ENTRIES", 500)},
    }
}

MEDIA_ROOT = Path(os.environ.get("MEDIA_ROOT", BASE_DIR / "media"))
MEDIA_URL = "media/"

# Production hardening; each can be relaxed from the environment (e.g. behind a TLS proxy).
if not DEBUG:
    SECURE_SSL_REDIRECT = env_bool("SECURE_SSL_REDIRECT", True)
    SECURE_PROXY_SSL_HEADER = ("HTTP_X_FORWARDED_PROTO", "https") if env_bool("BEHIND_TLS_PROXY", False) else None
    SECURE_HSTS_SECONDS = env_int("SECURE_HSTS_SECONDS", 31536000)
    SECURE_HSTS_INCLUDE_SUBDOMAINS = env_bool("SECURE_HSTS_INCLUDE_SUBDOMAINS", True)
    SECURE_HSTS_PRELOAD = env_bool("SECURE_HSTS_PRELOAD", True)
    SESSION_COOKIE_SECURE = True
    CSRF_COOKIE_SECURE = True

LOGGING = {
    "version": 1,
    "disable_existing_loggers": False,
    "handlers": {"console": {"class": "logging.StreamHandler"}},
    "root": {"handlers": ["console"], "level": os.environ.get("LOG_LEVEL", "WARNING")},
}
