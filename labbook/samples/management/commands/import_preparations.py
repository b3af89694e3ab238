"""``python manage.py import_preparations FILE --mapping MAP.json --user NAME [--commit]``:
past preparations from the lab's old spreadsheet, through the same action as the API
(:mod:`labbook.samples.importing` describes the file and the mapping)."""

from __future__ import annotations

import argparse

from django.contrib.auth import get_user_model
from django.core.management.base import (
    BaseCommand,
    CommandError,
    CommandParser,
    DjangoHelpFormatter,
)

from labbook.accounts.permissions import PermissionDenied
from labbook.samples.importing import (
    MappingError,
    apply_options,
    import_preparations,
    load_mapping,
    read_mapping_file,
)

FORMAT_HELP = """\
The file: a CSV with a header row. By default each row is one step (sputter, anneal, deposit,
dose, other); rows with the same "preparation" value (a prep-number column), or else the same
sample + instrument + start, form one preparation, in file order. A preparation's own fields
may sit on any one of its rows. With "layout": "row_per_preparation" each row is one
preparation and the mapping's "steps" name the columns of each step. Row numbers count the
header as row 1.

The mapping (JSON, --mapping; the options below override it):
  {"columns": [{"column": "Crystal", "field": "sample"},
               {"column": "Date", "field": "date"}, {"column": "Time", "field": "time"},
               {"column": "Step", "field": "kind"},
               {"column": "I (uA)", "field": "current_a", "unit": "uA"},
               {"column": "t (min)", "field": "duration_s", "unit": "min"}],
   "constants": {"instrument": "LTM-1", "beam_area_cm2": "1 cm^2"},
   "time_zone": "Europe/Berlin", "date_formats": ["%d.%m.%Y %H:%M", "%d.%m.%Y"],
   "kinds": {"flash": "anneal"}, "operators": {"AH": "amira"}, "fill_down": ["date"],
   "cleaning": "last_anneal_after_sputter", "extra_values": "reject",
   "delimiter": ",", "decimal": ".", "encoding": "utf-8-sig"}
Fields: preparation, sample, substrate, instrument, started_at (or date + time), operator,
recipe, preparation_notes; kind, cleans, notes and every step field (energy_ev, current_a,
beam_area_cm2, pressure_mbar, gas, duration_s, temperature_k, thermocouple_mv,
thermocouple_type, material, rate_ml_per_min, source, ...). A column's unit is the unit of
its bare numbers; a cell with its own unit ("90 s") keeps it. Times without an offset are in
time_zone (default: the instrument's zone) and are stored as UTC. Kind words built in:
sp/sputtering -> sputter, ann -> anneal, dep/evap -> deposit, dose/exposure -> dose.

Without --commit this is a dry run: everything is checked and done inside a transaction that
is rolled back, and the report says what would be imported and which rows would be rejected
(row, field, column, why). With --commit each preparation is saved atomically (all its rows
or none); good preparations are imported even when others are rejected. A preparation whose
sample + instrument + start is already in labbook is skipped: importing a file twice adds
nothing. The report, e.g.:
  Dry run of old-logbook.csv: nothing saved (give --commit to import)
  read 17 rows: 10 preparations
  would import 4 preparations, 9 steps
    Cu(111) #2: 3 preparations, 7 steps
    rows 2-4: Cu(111) #2 on LTM-1 at 2023-03-06 10:15 CET, 3 steps
  not imported: 6 preparations (8 rows):
    row 10: energy_ev (column 'E (keV)'): unknown unit 'kfoo' in '1 kfoo'; ...
    row 11: not imported: row 10 of the same preparation was rejected
"""


class _Formatter(DjangoHelpFormatter, argparse.RawDescriptionHelpFormatter):
    """Django's option order, with the format description kept as written."""


class Command(BaseCommand):
    help = (
        "Import past preparations from a CSV file (the old logbook spreadsheet) with a column "
        "mapping. A dry run unless --commit is given."
    )

    def create_parser(self, prog_name: str, subcommand: str, **kwargs) -> CommandParser:
        return super().create_parser(
            prog_name, subcommand, formatter_class=_Formatter, epilog=FORMAT_HELP, **kwargs
        )

    def add_arguments(self, parser: CommandParser) -> None:
        parser.add_argument("file", help="the CSV file")
        parser.add_argument("--mapping", help="the column mapping, a JSON file")
        parser.add_argument(
            "--user", required=True, help="the lab member the import acts as (history names them)"
        )
        mode = parser.add_mutually_exclusive_group()
        mode.add_argument(
            "--commit", action="store_true", help="save the good preparations (default: dry run)"
        )
        mode.add_argument(
            "--dry-run",
            action="store_true",
            help="check and report only, save nothing (the default)",
        )
        parser.add_argument(
            "--create-samples",
            action="store_true",
            help="create samples the file names but labbook lacks (needs a substrate column)",
        )
        parser.add_argument(
            "--map",
            action="append",
            default=[],
            metavar="FIELD=COLUMN",
            help="feed FIELD from COLUMN (repeatable; replaces the mapping's column for FIELD)",
        )
        parser.add_argument(
            "--unit",
            action="append",
            default=[],
            metavar="FIELD=UNIT",
            help="unit of bare numbers in the column that feeds FIELD, e.g. current_a=uA",
        )
        parser.add_argument(
            "--set",
            action="append",
            default=[],
            metavar="FIELD=VALUE",
            help="a constant for every row, e.g. instrument=LTM-1 or beam_area_cm2='1 cm^2'",
        )
        parser.add_argument(
            "--kind",
            action="append",
            default=[],
            metavar="WORD=KIND",
            help="another word for a step kind, e.g. flash=anneal",
        )
        parser.add_argument("--time-zone", help="zone of times without an offset")
        parser.add_argument(
            "--date-format",
            action="append",
            default=[],
            help="a strptime format for the dates, e.g. '%%d.%%m.%%Y %%H:%%M' (repeatable)",
        )

    def handle(self, *args, **options) -> None:
        user = get_user_model().objects.filter(username=options["user"]).first()
        if user is None:
            raise CommandError(f"no account {options['user']!r}")
        try:
            data = read_mapping_file(options["mapping"]) if options["mapping"] else {}
            data = apply_options(
                data,
                maps=options["map"],
                units=options["unit"],
                constants=options["set"],
                kinds=options["kind"],
                time_zone=options["time_zone"],
                date_formats=options["date_format"],
            )
            mapping = load_mapping(data)
            report = import_preparations(
                options["file"],
                mapping,
                actor=user,
                commit=options["commit"],
                create_samples=options["create_samples"],
            )
        except MappingError as exc:
            raise CommandError(
                "cannot import with this mapping:\n  " + "\n  ".join(exc.problems)
            ) from exc
        except FileNotFoundError as exc:
            raise CommandError(f"no such file: {exc.filename}") from exc
        except PermissionDenied as exc:
            raise CommandError(f"{user.username} may not log preparations: {exc}") from exc
        self.stdout.write(report.render())
