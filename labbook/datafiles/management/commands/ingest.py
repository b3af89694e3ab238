from __future__ import annotations

import json
from pathlib import Path

from django.contrib.auth import get_user_model
from django.core.management.base import BaseCommand, CommandError

from labbook.datafiles.folders import ingest_paths
from labbook.instruments.queries import instrument_named


def resolve_common(user: str, instrument: str | None):
    account = get_user_model().objects.filter(username=user).first()
    if account is None:
        raise CommandError(f"no user named {user!r}")
    scope = None
    if instrument:
        scope = instrument_named(instrument)
        if scope is None:
            raise CommandError(f"no instrument {instrument!r}")
    return account, scope


class Command(BaseCommand):
    help = "Ingest acquired files (files, or every file below a folder); same bytes once."

    def add_arguments(self, parser):
        parser.add_argument("paths", nargs="+", type=Path)
        parser.add_argument("--user", required=True, help="who ingests them (a lab member)")
        parser.add_argument("--instrument", help="the instrument the files come from (name or id)")
        parser.add_argument("--metadata", help="JSON object of metadata applied to every file")

    def handle(self, *args, paths, user, instrument, metadata, **options):
        account, scope = resolve_common(user, instrument)
        given = {}
        if metadata:
            try:
                given = json.loads(metadata)
            except ValueError as exc:
                raise CommandError(f"--metadata is not JSON: {exc}") from None
            if not isinstance(given, dict):
                raise CommandError("--metadata must be a JSON object")
        missing = [str(p) for p in paths if not p.exists()]
        if missing:
            raise CommandError(f"no such file or folder: {', '.join(missing)}")
        report = ingest_paths(paths, actor=account, instrument=scope, metadata=given)
        for path, file_id, status in report.created:
            self.stdout.write(f"new      #{file_id} {status:<10} {path}")
        for path, file_id in report.existing:
            self.stdout.write(f"existing #{file_id} {'':<10} {path}")
        for path, error in report.failed:
            self.stderr.write(f"failed   {path}: {error}")
        counts = (len(report.created), len(report.existing), len(report.failed))
        self.stdout.write("{} new, {} already stored, {} failed".format(*counts))
        if report.failed:
            raise CommandError(f"{len(report.failed)} file(s) could not be stored")
