from __future__ import annotations

import time
from pathlib import Path

from django.core.management.base import BaseCommand, CommandError

from labbook.datafiles.folders import FolderWatch
from labbook.datafiles.management.commands.ingest import resolve_common


class Command(BaseCommand):
    help = (
        "Watch a folder and ingest every file once it is complete (size and time unchanged for "
        "--settle seconds). Restart-safe: files that arrived while it was down are picked up."
    )

    def add_arguments(self, parser):
        parser.add_argument("folder", type=Path)
        parser.add_argument("--user", required=True, help="who ingests them (a lab member)")
        parser.add_argument("--instrument", help="the instrument this folder belongs to")
        parser.add_argument(
            "--settle", type=float, default=5.0, help="seconds a file must stay unchanged"
        )
        parser.add_argument("--interval", type=float, default=2.0, help="seconds between scans")
        parser.add_argument(
            "--once", action="store_true", help="scan once (after settling) and exit"
        )
        parser.add_argument("--max-seconds", type=float, help="stop after this long (tests, cron)")

    def handle(
        self, *args, folder, user, instrument, settle, interval, once, max_seconds, **options
    ):
        if not folder.is_dir():
            raise CommandError(f"{folder} is not a folder")
        account, scope = resolve_common(user, instrument)
        watch = FolderWatch(folder, actor=account, instrument=scope, settle_s=settle)
        started = time.monotonic()
        self.stdout.write(f"watching {folder} (settle {settle:g} s, every {interval:g} s)")
        while True:
            report = watch.scan()
            for path, file_id, status in report.created:
                self.stdout.write(f"new      #{file_id} {status:<10} {path}", ending="\n")
            for path, error in report.failed:
                self.stderr.write(f"failed   {path}: {error}")
            self.stdout.flush()
            elapsed = time.monotonic() - started
            if once and elapsed >= settle and not watch.pending:
                return
            if max_seconds is not None and elapsed >= max_seconds:
                return
            time.sleep(interval)
