from __future__ import annotations

from django.contrib.auth import get_user_model
from django.core.management.base import BaseCommand, CommandError

from labbook.accounts.actions import mint_token
from labbook.instruments.queries import instrument_named


class Command(BaseCommand):
    help = "Mint an API token for USER; prints the token alone on the last line (stored hashed)."

    def add_arguments(self, parser):
        parser.add_argument("user", help="username the token acts for")
        parser.add_argument("--instrument", help="limit writes to this instrument (name or id)")
        parser.add_argument("--read-only", action="store_true", help="the token may only read")
        parser.add_argument(
            "--label", default="", help="what the token is for, e.g. 'prep PC logger'"
        )

    def handle(self, *args, user, instrument, read_only, label, **options):
        User = get_user_model()  # noqa: N806
        try:
            account = User.objects.get(username=user)
        except User.DoesNotExist:
            raise CommandError(f"no user named {user!r}") from None
        scope = None
        if instrument:
            scope = instrument_named(instrument)
            if scope is None:
                raise CommandError(f"no instrument {instrument!r}")
        token, raw = mint_token(account, label=label, instrument=scope, read_only=read_only)
        limits = []
        if scope:
            limits.append(f"writes limited to {scope.name}")
        if read_only:
            limits.append("read-only")
        self.stderr.write(
            f"Token {token.hint}… for {account.username}"
            + (f" ({', '.join(limits)})" if limits else "")
            + ". It is shown once; only its hash is stored."
        )
        self.stdout.write(raw)
