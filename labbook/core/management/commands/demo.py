"""``python manage.py demo``: load the invented demo lab (idempotent; DESIGN.md §4)."""

from __future__ import annotations

import time

from django.contrib.auth import get_user_model
from django.core.management.base import BaseCommand, CommandError, CommandParser

from labbook.demo.instruments import INSTRUMENT_NAME
from labbook.demo.load import load_demo
from labbook.demo.people import DEMO_PASSWORD, PEOPLE, USERNAMES

LOGIN_URL = "http://127.0.0.1:8000/"


class Command(BaseCommand):
    help = (
        "Load the invented demo lab: its people, the microscope LTM-1 with its chambers and "
        "channels, and a year of logged readings. Safe to run again: it only adds what is "
        "missing."
    )

    def add_arguments(self, parser: CommandParser) -> None:
        parser.add_argument(
            "--days", type=int, default=365, help="days of readings up to now (default 365)"
        )
        parser.add_argument(
            "--quiet", action="store_true", help="print only how to log in, not each step"
        )
        parser.add_argument(
            "--force",
            action="store_true",
            help="load even though the database has accounts that are not demo accounts",
        )

    def handle(self, *args, days: int, quiet: bool, force: bool, **options) -> None:
        if days < 1:
            raise CommandError("--days must be at least 1")
        # The demo accounts share a published password: adding them to a lab's real database
        # would open it to anyone who read the README. Refuse unless told otherwise.
        others = get_user_model().objects.exclude(username__in=USERNAMES)
        if not force and others.exists():
            raise CommandError(
                f"this database has {others.count()} account(s) besides the demo ones; the demo "
                f"adds accounts with the published password {DEMO_PASSWORD!r}. Use a fresh "
                "database (LABBOOK_DATA_DIR or DATABASE_URL), or pass --force if you mean it."
            )
        verbosity = int(options.get("verbosity", 1))
        began = time.perf_counter()
        counts = load_demo(None if quiet or verbosity < 1 else self.stdout, days=days)
        elapsed = time.perf_counter() - began
        if verbosity < 1:
            return
        if not quiet:
            self.stdout.write(
                self.style.SUCCESS(
                    f"Demo lab ready in {elapsed:.1f} s: {counts['users']} accounts, "
                    f"{INSTRUMENT_NAME} with {counts['chambers']} chambers and "
                    f"{counts['channels']} channels, {counts['readings']:,} readings."
                )
            )
        self.stdout.write(f"\nLog in at {LOGIN_URL} as")
        width = max(len(person.username) for person in PEOPLE)
        for person in PEOPLE:
            note = " (in no lab group: sees nothing)" if person.role == "outsider" else ""
            self.stdout.write(
                f"  {person.username:<{width}}  {person.role:<8}  "
                f"{person.first_name} {person.last_name}, {person.title}{note}"
            )
        self.stdout.write(
            f"with the password {DEMO_PASSWORD}  (the same for all; demo data only, set when "
            "each account was created)"
        )
