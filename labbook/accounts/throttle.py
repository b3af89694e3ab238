"""Failed logins are throttled per username and per client address.

After ``LABBOOK_LOGIN_MAX_FAILURES`` failures (default 5) within ``LABBOOK_LOGIN_WINDOW_S``
(default 15 min) for one username, or from one address, further attempts are refused for
``LABBOOK_LOGIN_COOLDOWN_S`` (default 15 min) without the password being checked, so
guessing stops paying. A successful login clears the username's count (the address keeps its
own, so one good account cannot launder guesses against others).

The counts live in Django's cache: with one process (the embedded setup) the default local
memory cache is enough; several web processes must share a cache (Redis) for the limit to be
lab-wide rather than per process.
"""

from __future__ import annotations

import hashlib
import logging
import math
import time
from dataclasses import dataclass

from django.conf import settings
from django.core.cache import cache

log = logging.getLogger(__name__)

_PREFIX = "labbook:login"


def max_failures() -> int:
    return int(getattr(settings, "LABBOOK_LOGIN_MAX_FAILURES", 5))


def window_s() -> int:
    return int(getattr(settings, "LABBOOK_LOGIN_WINDOW_S", 15 * 60))


def cooldown_s() -> int:
    return int(getattr(settings, "LABBOOK_LOGIN_COOLDOWN_S", 15 * 60))


def _key(what: str, kind: str, value: str) -> str:
    # Hashed: a username or address may hold characters a cache backend refuses in keys.
    digest = hashlib.sha256(value.encode("utf-8", "surrogatepass")).hexdigest()[:32]
    return f"{_PREFIX}:{what}:{kind}:{digest}"


def normalise_username(username: str) -> str:
    # "Bo" and "bo " are the same guess at the same account for the counter's purpose.
    return (username or "").strip().casefold()[:150]


@dataclass(frozen=True)
class Refusal:
    """Why and for how long an attempt is refused."""

    by: str  # "username" or "address"
    retry_after_s: int

    @property
    def minutes(self) -> int:
        return max(1, math.ceil(self.retry_after_s / 60))

    @property
    def message(self) -> str:
        unit = "minute" if self.minutes == 1 else "minutes"
        return f"Too many failed logins for this {self.by}. Try again in {self.minutes} {unit}."


def _subjects(username: str, address: str) -> list[tuple[str, str]]:
    found = []
    name = normalise_username(username)
    if name:
        found.append(("username", name))
    if address:
        found.append(("address", address))
    return found


def refusal(username: str, address: str) -> Refusal | None:
    """The refusal in force for this username or address, if any."""
    now = time.time()
    for kind, value in _subjects(username, address):
        until = cache.get(_key("blocked", kind, value))
        if until is not None and until > now:
            return Refusal(kind, max(1, math.ceil(until - now)))
    return None


def record_failure(username: str, address: str) -> Refusal | None:
    """Count one failed attempt; returns the refusal it starts, if it reaches the limit."""
    started: Refusal | None = None
    for kind, value in _subjects(username, address):
        key = _key("failures", kind, value)
        # add() opens the window only on the first failure; incr() is atomic on shared caches.
        cache.add(key, 0, timeout=window_s())
        try:
            count = cache.incr(key)
        except ValueError:  # the window ran out between add() and incr()
            cache.set(key, 1, timeout=window_s())
            count = 1
        if count >= max_failures():
            until = time.time() + cooldown_s()
            cache.set(_key("blocked", kind, value), until, timeout=cooldown_s())
            cache.delete(key)
            started = started or Refusal(kind, cooldown_s())
            log.warning(
                "login throttled: %d failed attempts for %s %r; refused for %d s",
                count,
                kind,
                value,
                cooldown_s(),
            )
    if started is None:
        log.info("failed login for username %r from %s", normalise_username(username), address)
    return started


def record_success(username: str) -> None:
    name = normalise_username(username)
    if name:
        cache.delete(_key("failures", "username", name))


def client_address(request) -> str:
    """The caller's address as the web server saw it. Behind a reverse proxy this is the
    proxy's unless the proxy sets REMOTE_ADDR (gunicorn with ``--forwarded-allow-ips``);
    X-Forwarded-For is not trusted here, since any client can write it."""
    return str(request.META.get("REMOTE_ADDR", "") or "")
