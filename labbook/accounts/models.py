from __future__ import annotations

import hashlib
import secrets

from django.conf import settings
from django.db import models
from django.utils import timezone

TOKEN_PREFIX = "lbk_"  # noqa: S105 - a public prefix that marks labbook tokens, not a secret


def hash_token(raw: str) -> str:
    # Tokens are 256-bit random strings, so one round of SHA-256 is enough: there is no
    # low-entropy password to protect against a dictionary attack.
    return hashlib.sha256(raw.encode()).hexdigest()


class ApiTokenQuerySet(models.QuerySet):
    def active(self, now=None):
        now = timezone.now() if now is None else now
        return self.filter(revoked_at__isnull=True).filter(
            models.Q(expires_at__isnull=True) | models.Q(expires_at__gt=now)
        )


class ApiToken(models.Model):
    """A script's key to the API (a chamber-PC logger, an acquisition hook).

    Only the SHA-256 of the token is stored; the token itself is shown once, when minted.
    A token may be limited to one instrument (it can then write only that instrument's records)
    and may be read-only.
    """

    user = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.CASCADE, related_name="api_tokens"
    )
    label = models.CharField(max_length=100, blank=True)
    token_hash = models.CharField(max_length=64, unique=True)
    # The first characters let a person tell tokens apart in lists without revealing them.
    hint = models.CharField(max_length=12)
    instrument = models.ForeignKey(
        "instruments.Instrument",
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="api_tokens",
    )
    read_only = models.BooleanField(default=False)
    created_at = models.DateTimeField(auto_now_add=True)
    expires_at = models.DateTimeField(null=True, blank=True)
    last_used_at = models.DateTimeField(null=True, blank=True)
    revoked_at = models.DateTimeField(null=True, blank=True)

    objects = ApiTokenQuerySet.as_manager()

    class Meta:
        ordering = ["-created_at"]

    def __str__(self) -> str:
        scope = f" @{self.instrument}" if self.instrument_id else ""
        mode = " read-only" if self.read_only else ""
        return f"{self.hint}… for {self.user}{scope}{mode}"

    @staticmethod
    def new_raw_token() -> str:
        return TOKEN_PREFIX + secrets.token_urlsafe(32)
