"""Small typed readers for the environment; a bad value fails fast with the variable's name.

Nothing here needs Django to be set up: settings.py reads the environment through these.
"""

from __future__ import annotations

import os
from urllib.parse import parse_qsl, unquote, urlsplit

from django.core.exceptions import ImproperlyConfigured

_TRUE = {"1", "true", "yes", "on"}
_FALSE = {"0", "false", "no", "off", ""}


def env_str(name: str, default: str = "") -> str:
    return os.environ.get(name, default)


def env_bool(name: str, default: bool = False) -> bool:
    raw = os.environ.get(name)
    if raw is None:
        return default
    value = raw.strip().lower()
    if value in _TRUE:
        return True
    if value in _FALSE:
        return False
    raise ImproperlyConfigured(f"{name}={raw!r} is not a boolean (use true/false, 1/0, yes/no)")


def env_int(name: str, default: int) -> int:
    raw = os.environ.get(name)
    if raw is None or raw.strip() == "":
        return default
    try:
        return int(raw)
    except ValueError as exc:
        raise ImproperlyConfigured(f"{name}={raw!r} is not an integer") from exc


def env_list(name: str, default: list[str]) -> list[str]:
    raw = os.environ.get(name)
    if raw is None:
        return list(default)
    return [item.strip() for item in raw.split(",") if item.strip()]


def database_from_url(url: str, *, conn_max_age: int = 60) -> dict:
    """Django DATABASES entry for a ``postgres://`` or ``sqlite:///`` URL."""
    parts = urlsplit(url)
    scheme = parts.scheme.lower()
    if scheme in {"postgres", "postgresql", "pgsql"}:
        name = unquote(parts.path.lstrip("/"))
        if not name:
            raise ImproperlyConfigured(f"DATABASE_URL {url!r} names no database")
        options = dict(parse_qsl(parts.query))
        # A database that hangs (a network partition, a stuck server) must fail fast into the
        # clear 503, not hold a web worker until gunicorn kills it with an HTML 500: give up
        # connecting after 5 s, and notice a dead peer on an open connection within ~30 s.
        # The URL's own query options (?connect_timeout=…) win.
        for key, value in (
            ("connect_timeout", "5"),
            ("keepalives", "1"),
            ("keepalives_idle", "10"),
            ("keepalives_interval", "5"),
            ("keepalives_count", "3"),
            ("tcp_user_timeout", "30000"),
        ):
            options.setdefault(key, value)
        return {
            "ENGINE": "django.db.backends.postgresql",
            "NAME": name,
            "USER": unquote(parts.username or ""),
            "PASSWORD": unquote(parts.password or ""),
            "HOST": parts.hostname or "",
            "PORT": str(parts.port or ""),
            "OPTIONS": options,
            # Persistent connections: a new PostgreSQL connection costs as much as
            # 20-45 primary-key lookups (PERFORMANCE.md).
            "CONN_MAX_AGE": conn_max_age,
            "CONN_HEALTH_CHECKS": True,
        }
    if scheme == "sqlite":
        path = unquote(parts.path)
        if path.startswith("//"):
            path = path[1:]
        elif path.startswith("/") and not parts.netloc:
            path = path[1:] or ":memory:"
        return {"ENGINE": "django.db.backends.sqlite3", "NAME": path or ":memory:"}
    raise ImproperlyConfigured(
        f"DATABASE_URL scheme {scheme!r} is not supported (use postgres:// or sqlite:///)"
    )
