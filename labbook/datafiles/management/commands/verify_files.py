from __future__ import annotations

from django.core.management.base import BaseCommand, CommandError

from labbook.datafiles.integrity import verify_all


class Command(BaseCommand):
    help = "Re-hash every stored file; report any that changed or went missing (deletes nothing)."

    def handle(self, *args, **options):
        report = verify_all()
        for item in report.problems:
            self.stderr.write(f"{item.state:<8} #{item.file_id} {item.name} ({item.sha256[:12]}…)")
        self.stdout.write(
            f"{report.checked} files checked: {report.ok} intact, {len(report.changed)} changed, "
            f"{len(report.missing)} missing"
        )
        if report.problems:
            raise CommandError(f"{len(report.problems)} stored file(s) changed or missing")
