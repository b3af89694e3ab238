"""Import past preparations from the lab's old spreadsheet (CSV), through the same action as the
API, so an imported dose is computed by the same code as one logged today.

The file
--------
A CSV file with a header row; columns are named by their header text. Two layouts:

* ``row_per_step`` (the default): each row is one step (sputter, anneal, deposit, dose or
  other). Rows are grouped into preparations by the ``preparation`` field when it is mapped (a
  "Prep no." column), otherwise by sample + instrument + start time. A preparation's own fields
  (sample, instrument, start, operator, recipe, notes) may sit on any one of its rows; the
  others may leave them blank, but may not contradict them. Steps keep the file's row order.
* ``row_per_preparation``: each row is one preparation, with a group of columns per step
  (``"steps"`` in the mapping: the sputter columns, the anneal columns, …). A step whose
  columns are all blank in a row was not done in that preparation.

Row numbers in reports count the header as row 1, as a spreadsheet program shows them.
Blank rows are ignored.

The mapping (a JSON file, or ``--map``/``--unit``/``--set`` options of the command)
-----------------------------------------------------------------------------------
::

    {
      "layout": "row_per_step",
      "delimiter": ",", "encoding": "utf-8-sig", "decimal": ".",
      "time_zone": "Europe/Berlin",
      "date_formats": ["%d.%m.%Y %H:%M", "%d.%m.%Y"],
      "columns": [
        {"column": "Prep", "field": "preparation"},
        {"column": "Date", "field": "date"}, {"column": "Time", "field": "time"},
        {"column": "Crystal", "field": "sample"}, {"column": "Substrate", "field": "substrate"},
        {"column": "Who", "field": "operator"}, {"column": "Step", "field": "kind"},
        {"column": "I (uA)", "field": "current_a", "unit": "uA"},
        {"column": "t (min)", "field": "duration_s", "unit": "min"}
      ],
      "constants": {"instrument": "LTM-1", "beam_area_cm2": "1 cm^2"},
      "kinds": {"flash": "anneal"},
      "operators": {"AH": "amira"},
      "fill_down": ["date"],
      "cleaning": "last_anneal_after_sputter",
      "extra_values": "reject"
    }

* ``columns``: which column feeds which field. Preparation fields: ``preparation`` (grouping
  only), ``sample``, ``substrate`` (to create unknown samples), ``instrument``,
  ``started_at`` — or ``date`` and ``time`` in two columns —, ``operator``, ``recipe``
  ("name" for its newest version, or "name v2"), ``preparation_notes``. Step fields: ``kind``,
  ``cleans``, ``notes``, and every field of the step kinds in :mod:`labbook.samples.steps`
  (``energy_ev``, ``current_a``, ``duration_s``, ``temperature_k``, ``pressure_mbar``,
  ``gas``, ``material``, ``rate_ml_per_min``, ``source`` (a deposition source's name on the
  instrument), ``thermocouple_mv``, ``thermocouple_type`` …). ``notes`` and
  ``preparation_notes`` may be fed by several columns (joined); any other field by one.
* ``unit``: the unit of a bare number in that column (old sheets put it in the header:
  "I (uA)"). A cell that carries its own unit ("90 s") is read with that unit.
* ``constants``: a value for every row (the instrument, a beam area, the thermocouple type).
  A step constant only applies to the kinds that have the field, and a cell overrides it.
* ``time_zone``: the zone of times written without an offset (old sheets have local times);
  by default the instrument's zone, else the site's ``TIME_ZONE``. Stored as aware UTC.
  A local time that does not exist or happens twice (daylight-saving switches) is rejected:
  write it with its offset ("2023-10-29 02:30 +01:00").
* ``date_formats``: ``strptime`` formats tried in order after ISO 8601.
* ``kinds``: more words for step kinds, beside the built-in ones ("sp", "sputtering" →
  sputter, "ann" → anneal, "dep", "evap" → deposit, "dose", "exposure" → dose, …).
* ``operators``: names in the sheet (initials, first names) → usernames. Otherwise a cell is
  matched to a username or a "First Last" full name; a blank operator is the importing user.
* ``fill_down``: fields whose blank cells repeat the value above (sheets that write the date
  only when it changes).
* ``cleaning``: ``"column"`` (the default: only a ``cleans`` column marks cleaning steps) or
  ``"last_anneal_after_sputter"`` (a preparation's last anneal after a sputter restores a
  clean surface, unless a ``cleans`` cell says otherwise).
* ``description``: free text about the mapping, ignored.
* ``extra_values``: a value in a column the step's kind has no field for (a pressure noted
  beside an anneal) is ``"reject"``-ed (the default) or kept in the step's notes
  (``"notes"``), so nothing written in the sheet is lost silently.

What happens
------------
Each preparation goes through :func:`labbook.samples.actions.record_preparation` as the given
user, atomically: all its rows or none. A bad row rejects its preparation and is reported with
its row number, field, column and the message of the step check; the good preparations are
imported anyway. A preparation whose sample + instrument + start is already in labbook is
skipped, so re-importing a file adds nothing. A dry run does everything, inside a transaction
that is rolled back, so its report is exactly what an import would do.
"""

from __future__ import annotations

import csv
import io
import json
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from django.conf import settings
from django.contrib.auth import get_user_model
from django.core.exceptions import ValidationError
from django.db import transaction
from django.db.models import Q

from labbook.accounts.permissions import require_member
from labbook.instruments.models import Instrument
from labbook.samples import actions
from labbook.samples.models import DepositionSource, Preparation, Recipe, Sample
from labbook.samples.steps import (
    STEP_KINDS,
    Measure,
    StepErrors,
    normalise_step,
)
from labbook.science.errors import ScienceInputError
from labbook.science.units import parse_quantity

# --- the fields a column can feed ------------------------------------------------------------

PREPARATION_FIELDS = (
    "preparation",
    "sample",
    "substrate",
    "instrument",
    "started_at",
    "date",
    "time",
    "operator",
    "recipe",
    "preparation_notes",
)
#: Every field of any step kind, with its spec (a field has the same unit in every kind).
STEP_FIELD_SPECS: dict[str, Any] = {}
for _kind in STEP_KINDS.values():
    for _name, _spec in _kind.fields.items():
        STEP_FIELD_SPECS.setdefault(_name, _spec)
STEP_FIELDS = ("kind", "cleans", "notes", *STEP_FIELD_SPECS)
_JOINED_FIELDS = {"notes", "preparation_notes"}

#: Words old sheets use for the step kinds (lower case, spaces collapsed).
DEFAULT_KIND_SYNONYMS: dict[str, str] = {
    **{word: "sputter" for word in ("sputter", "sp", "spu", "sput", "sputtering", "ar+")},
    **{word: "anneal" for word in ("anneal", "ann", "annealing", "heat", "heating", "flash")},
    **{
        word: "deposit"
        for word in ("deposit", "dep", "depo", "deposition", "evap", "evaporation", "evaporate")
    },
    **{word: "dose" for word in ("dose", "dosing", "exposure", "expose", "gas dose", "leak")},
    **{word: "other" for word in ("other", "note", "misc")},
}

LAYOUTS = ("row_per_step", "row_per_preparation")
CLEANING_RULES = ("column", "last_anneal_after_sputter")
EXTRA_VALUE_RULES = ("reject", "notes")

_BARE_NUMBER = re.compile(r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?$")
_SPACE_BEFORE_OFFSET = re.compile(r"\s+([+-]\d{2}:?\d{2}|Z)$")
_RECIPE_VERSION = re.compile(r"^(?P<name>.+?)\s+v(?P<version>\d+)$", flags=re.IGNORECASE)


class MappingError(ValueError):
    """The mapping (or the file's header) cannot be used; nothing was read. ``problems``
    lists every problem found, so a mapping can be fixed in one go."""

    def __init__(self, problems: list[str]) -> None:
        super().__init__("; ".join(problems))
        self.problems = problems


@dataclass(frozen=True)
class Column:
    column: str
    field: str
    unit: str | None = None


@dataclass(frozen=True)
class StepColumns:
    """One step of the ``row_per_preparation`` layout: its kind and the columns that feed it."""

    kind: str
    columns: tuple[Column, ...]
    constants: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class ImportMapping:
    columns: tuple[Column, ...]
    constants: Mapping[str, Any] = field(default_factory=dict)
    layout: str = "row_per_step"
    steps: tuple[StepColumns, ...] = ()
    time_zone: str | None = None
    date_formats: tuple[str, ...] = ()
    kinds: Mapping[str, str] = field(default_factory=lambda: dict(DEFAULT_KIND_SYNONYMS))
    operators: Mapping[str, str] = field(default_factory=dict)
    fill_down: tuple[str, ...] = ()
    cleaning: str = "column"
    extra_values: str = "reject"
    delimiter: str = ","
    encoding: str = "utf-8-sig"
    decimal: str = "."

    @property
    def all_columns(self) -> tuple[Column, ...]:
        return self.columns + tuple(c for step in self.steps for c in step.columns)

    def mapped(self, name: str) -> bool:
        return name in self.constants or any(c.field == name for c in self.all_columns)


def _kind_word(text: str) -> str:
    return " ".join(str(text).lower().split()).rstrip(".")


def _check_unit(where: str, name: str, unit: str, problems: list[str]) -> None:
    spec = STEP_FIELD_SPECS.get(name)
    if not isinstance(spec, Measure):
        problems.append(f"{where}: field {name!r} is not a number, so it takes no unit")
        return
    try:
        parse_quantity(f"1 {unit}", spec.unit, field=name)
    except ScienceInputError as exc:
        problems.append(f"{where}: unit {unit!r} does not fit {name} ({exc})")


def _columns(raw: Any, where: str, allowed: Iterable[str], problems: list[str]) -> list[Column]:
    allowed = set(allowed)
    out: list[Column] = []
    if not isinstance(raw, list):
        problems.append(f"{where} must be a list of {{column, field, unit?}}")
        return out
    for index, item in enumerate(raw):
        if not isinstance(item, Mapping) or "column" not in item or "field" not in item:
            problems.append(f"{where}[{index}] needs a column and a field")
            continue
        unknown = set(item) - {"column", "field", "unit"}
        if unknown:
            problems.append(f"{where}[{index}]: unknown key(s) {', '.join(sorted(unknown))}")
        column = Column(str(item["column"]), str(item["field"]), item.get("unit") or None)
        if column.field not in allowed:
            problems.append(
                f"{where}[{index}]: column {column.column!r} feeds unknown field {column.field!r}"
            )
            continue
        if column.unit is not None:
            _check_unit(f"column {column.column!r}", column.field, str(column.unit), problems)
        out.append(column)
    return out


def load_mapping(data: Mapping[str, Any]) -> ImportMapping:
    """Check a mapping (as read from its JSON file) and build it; raises ``MappingError``
    with every problem at once."""
    problems: list[str] = []
    known_keys = {
        "layout",
        "columns",
        "steps",
        "constants",
        "time_zone",
        "date_formats",
        "kinds",
        "operators",
        "fill_down",
        "cleaning",
        "extra_values",
        "delimiter",
        "encoding",
        "decimal",
        "description",
    }
    unknown = set(data) - known_keys
    if unknown:
        problems.append(f"unknown mapping key(s): {', '.join(sorted(unknown))}")
    layout = data.get("layout", "row_per_step")
    if layout not in LAYOUTS:
        problems.append(f"layout must be one of {', '.join(LAYOUTS)}, got {layout!r}")
    top_fields = (
        PREPARATION_FIELDS
        if layout == "row_per_preparation"
        else (
            *PREPARATION_FIELDS,
            *STEP_FIELDS,
        )
    )
    columns = _columns(data.get("columns", []), "columns", top_fields, problems)

    steps: list[StepColumns] = []
    if layout == "row_per_preparation":
        raw_steps = data.get("steps")
        if not isinstance(raw_steps, list) or not raw_steps:
            problems.append("the row_per_preparation layout needs steps: [{kind, columns}]")
            raw_steps = []
        for index, raw in enumerate(raw_steps):
            kind = raw.get("kind") if isinstance(raw, Mapping) else None
            if kind not in STEP_KINDS:
                problems.append(f"steps[{index}]: kind must be one of {', '.join(STEP_KINDS)}")
                continue
            step_columns = _columns(
                raw.get("columns", []),
                f"steps[{index}].columns",
                ("cleans", "notes", *STEP_KINDS[kind].fields),
                problems,
            )
            steps.append(StepColumns(kind, tuple(step_columns), dict(raw.get("constants", {}))))
    elif data.get("steps"):
        problems.append("steps are for the row_per_preparation layout")

    constants = data.get("constants", {})
    if not isinstance(constants, Mapping):
        problems.append("constants must be an object {field: value}")
        constants = {}
    for name in constants:
        if name not in (*PREPARATION_FIELDS, *STEP_FIELDS):
            problems.append(f"constants: unknown field {name!r}")

    seen: dict[str, str] = {}
    for column in columns + [c for s in steps for c in s.columns]:
        if column.field in seen and column.field not in _JOINED_FIELDS and layout == "row_per_step":
            problems.append(
                f"field {column.field!r} is fed by two columns ({seen[column.field]!r} and "
                f"{column.column!r})"
            )
        seen.setdefault(column.field, column.column)
    fed = set(seen) | set(constants)
    if "started_at" in fed and ({"date", "time"} & fed):
        problems.append("give started_at, or date (and time), not both")
    if "time" in fed and "date" not in fed:
        problems.append("a time column needs a date column")
    for needed, alternatives in (
        ("sample", ("sample",)),
        ("instrument", ("instrument",)),
        ("started_at", ("started_at", "date")),
    ):
        if not fed & set(alternatives):
            problems.append(f"nothing feeds {needed} (map a column or give a constant)")
    if layout == "row_per_step" and "kind" not in fed:
        problems.append("nothing feeds kind (map the column that names the step)")

    time_zone = data.get("time_zone")
    if time_zone is not None:
        try:
            ZoneInfo(str(time_zone))
        except (ZoneInfoNotFoundError, ValueError):
            problems.append(f"time_zone {time_zone!r} is not an IANA zone (e.g. Europe/Berlin)")
    kinds = dict(DEFAULT_KIND_SYNONYMS)
    for word, kind in dict(data.get("kinds", {})).items():
        if kind not in STEP_KINDS:
            problems.append(f"kinds: {word!r} → {kind!r}, which is not a step kind")
        kinds[_kind_word(word)] = kind
    fill_down = tuple(data.get("fill_down", ()))
    for name in fill_down:
        if name not in seen:
            problems.append(f"fill_down: no column feeds {name!r}")
    cleaning = data.get("cleaning", "column")
    if cleaning not in CLEANING_RULES:
        problems.append(f"cleaning must be one of {', '.join(CLEANING_RULES)}")
    extra = data.get("extra_values", "reject")
    if extra not in EXTRA_VALUE_RULES:
        problems.append(f"extra_values must be one of {', '.join(EXTRA_VALUE_RULES)}")
    decimal = data.get("decimal", ".")
    if decimal not in (".", ","):
        problems.append("decimal must be '.' or ','")
    delimiter = data.get("delimiter", ",")
    if not isinstance(delimiter, str) or len(delimiter) != 1:
        problems.append("delimiter must be one character")
    if problems:
        raise MappingError(problems)
    return ImportMapping(
        columns=tuple(columns),
        constants=dict(constants),
        layout=layout,
        steps=tuple(steps),
        time_zone=time_zone,
        date_formats=tuple(data.get("date_formats", ())),
        kinds=kinds,
        operators={str(k).strip().lower(): str(v) for k, v in data.get("operators", {}).items()},
        fill_down=fill_down,
        cleaning=cleaning,
        extra_values=extra,
        delimiter=delimiter,
        encoding=str(data.get("encoding", "utf-8-sig")),
        decimal=decimal,
    )


def _split_option(text: str, what: str) -> tuple[str, str]:
    name, sep, value = text.partition("=")
    if not sep or not name.strip():
        raise MappingError([f"{what} {text!r}: write it as name=value"])
    return name.strip(), value.strip()


def apply_options(
    data: Mapping[str, Any],
    *,
    maps: Iterable[str] = (),
    units: Iterable[str] = (),
    constants: Iterable[str] = (),
    kinds: Iterable[str] = (),
    time_zone: str | None = None,
    date_formats: Iterable[str] = (),
) -> dict[str, Any]:
    """The mapping ``data`` with the command's options laid over it: ``maps`` ("field=Column",
    replacing any column that fed the field), ``units`` ("field=unit", for the column that
    feeds the field), ``constants`` ("field=value"), ``kinds`` ("word=kind"), a time zone and
    more date formats (tried first)."""
    out = {key: value for key, value in data.items()}
    columns = [dict(c) for c in out.get("columns", [])]
    for text in maps:
        name, column = _split_option(text, "--map")
        columns = [c for c in columns if c.get("field") != name]
        columns.append({"column": column, "field": name})
    for text in units:
        name, unit = _split_option(text, "--unit")
        targets = [c for c in columns if c.get("field") == name]
        if not targets:
            raise MappingError([f"--unit {text!r}: no column feeds {name!r}"])
        for column in targets:
            column["unit"] = unit
    out["columns"] = columns
    if constants:
        out["constants"] = dict(out.get("constants", {}))
        for text in constants:
            name, value = _split_option(text, "--set")
            out["constants"][name] = value
    if kinds:
        out["kinds"] = dict(out.get("kinds", {}))
        for text in kinds:
            word, kind = _split_option(text, "--kind")
            out["kinds"][word] = kind
    if time_zone:
        out["time_zone"] = time_zone
    date_formats = list(date_formats)
    if date_formats:
        out["date_formats"] = [*date_formats, *out.get("date_formats", [])]
    return out


# --- the report ----------------------------------------------------------------------------


@dataclass(frozen=True)
class Problem:
    """Why a row was not imported: its row number, the field and column, and the message."""

    row: int
    field: str
    message: str
    column: str = ""

    def __str__(self) -> str:
        where = self.field
        if self.column:
            where += f" (column {self.column!r})" if self.column != "constant" else " (constant)"
        return (
            f"row {self.row}: {where}: {self.message}"
            if where
            else f"row {self.row}: {self.message}"
        )


IMPORTED = "imported"
WOULD_IMPORT = "would import"
SKIPPED = "skipped"
REJECTED = "rejected"


@dataclass
class PreparationOutcome:
    rows: list[int]
    sample: str
    instrument: str
    started_at: datetime | None
    status: str
    steps: int = 0
    problems: list[Problem] = field(default_factory=list)
    reason: str = ""
    preparation_id: int | None = None
    new_sample: tuple[str, str] | None = None  # (name, substrate) if created for it
    zone: str = "UTC"

    @property
    def row_span(self) -> str:
        first, last = min(self.rows), max(self.rows)
        return f"row {first}" if first == last else f"rows {first}-{last}"

    @property
    def when(self) -> str:
        if self.started_at is None:
            return "?"
        return self.started_at.astimezone(ZoneInfo(self.zone)).strftime("%Y-%m-%d %H:%M %Z")


@dataclass
class ImportReport:
    source: str
    committed: bool
    rows_read: int = 0
    outcomes: list[PreparationOutcome] = field(default_factory=list)

    def with_status(self, *statuses: str) -> list[PreparationOutcome]:
        return [o for o in self.outcomes if o.status in statuses]

    @property
    def imported(self) -> list[PreparationOutcome]:
        return self.with_status(IMPORTED, WOULD_IMPORT)

    @property
    def skipped(self) -> list[PreparationOutcome]:
        return self.with_status(SKIPPED)

    @property
    def rejected(self) -> list[PreparationOutcome]:
        return self.with_status(REJECTED)

    @property
    def problems(self) -> list[Problem]:
        return sorted(
            (p for o in self.rejected for p in o.problems), key=lambda p: (p.row, p.field)
        )

    def per_sample(self) -> dict[str, tuple[int, int]]:
        """(preparations, steps) imported (or that would be) per sample name."""
        out: dict[str, tuple[int, int]] = {}
        for outcome in self.imported:
            n, steps = out.get(outcome.sample, (0, 0))
            out[outcome.sample] = (n + 1, steps + outcome.steps)
        return dict(sorted(out.items()))

    def render(self) -> str:
        """The report as the command prints it (an example is in the command's help)."""
        lines = []
        if self.committed:
            lines.append(f"Import of {self.source}")
            verb = "imported"
        else:
            lines.append(f"Dry run of {self.source}: nothing saved (give --commit to import)")
            verb = "would import"
        lines.append(f"read {_n(self.rows_read, 'row')}: {_n(len(self.outcomes), 'preparation')}")
        n_steps = sum(o.steps for o in self.imported)
        lines.append(f"{verb} {_n(len(self.imported), 'preparation')}, {_n(n_steps, 'step')}")
        for name, (n, steps) in self.per_sample().items():
            lines.append(f"  {name}: {_n(n, 'preparation')}, {_n(steps, 'step')}")
        for name, substrate in sorted({o.new_sample for o in self.imported if o.new_sample}):
            lines.append(f"  new sample {name} ({substrate})")
        for o in self.imported:
            lines.append(
                f"  {o.row_span}: {o.sample} on {o.instrument} at {o.when}, {_n(o.steps, 'step')}"
            )
        if self.skipped:
            lines.append(f"skipped {_n(len(self.skipped), 'preparation')}:")
            for o in self.skipped:
                lines.append(
                    f"  {o.row_span}: {o.sample} on {o.instrument} at {o.when}: {o.reason}"
                )
        if self.rejected:
            rows = sum(len(o.rows) for o in self.rejected)
            lines.append(
                f"not imported: {_n(len(self.rejected), 'preparation')} ({_n(rows, 'row')}):"
            )
            for problem in self.problems:
                lines.append(f"  {problem}")
        return "\n".join(lines)


def _n(count: int, word: str) -> str:
    return f"{count} {word}" + ("" if count == 1 else "s")


# --- reading rows --------------------------------------------------------------------------


@dataclass
class _Cell:
    text: str
    column: str  # the column(s) it came from, for messages; "" for a constant


@dataclass
class _StepInput:
    row: int
    label: str  # "" in row_per_step, "step 2 (anneal)" in row_per_preparation
    data: dict[str, Any]
    columns: dict[str, str]  # field -> column, for messages


@dataclass
class _Row:
    number: int
    cells: dict[str, _Cell]  # preparation fields
    steps: list[_StepInput]
    problems: list[Problem] = field(default_factory=list)


def _open_text(source: str | Path | io.TextIOBase, encoding: str) -> tuple[str, io.TextIOBase]:
    if isinstance(source, str | Path):
        path = Path(source)
        return str(path), path.open(encoding=encoding, newline="")
    return getattr(source, "name", "<csv>"), source


def _cells(
    record: list[str], header: dict[str, int], columns: Iterable[Column]
) -> dict[str, tuple[str, Column]]:
    out: dict[str, tuple[str, Column]] = {}
    for column in columns:
        index = header[column.column]
        text = record[index].strip() if index < len(record) else ""
        if column.field in _JOINED_FIELDS and column.field in out:
            if text:
                joined = "; ".join(t for t in (out[column.field][0], text) if t)
                out[column.field] = (joined, column)
            continue
        out[column.field] = (text, column)
    return out


def _quantity_text(text: str, column: Column, mapping: ImportMapping) -> str:
    if mapping.decimal == "," and text.count(",") == 1 and "." not in text:
        text = text.replace(",", ".")
    if column.unit and _BARE_NUMBER.match(text):
        return f"{text} {column.unit}"
    return text


def _step_from_cells(
    row: int,
    label: str,
    kind: str | None,
    kind_cell: tuple[str, Column] | None,
    cells: dict[str, tuple[str, Column]],
    constants: Mapping[str, Any],
    mapping: ImportMapping,
    problems: list[Problem],
) -> _StepInput | None:
    if kind is None:
        text = kind_cell[0] if kind_cell else str(constants.get("kind", ""))
        column = kind_cell[1].column if kind_cell else ""
        if not text:
            problems.append(Problem(row, "kind", "is required", column))
            return None
        kind = mapping.kinds.get(_kind_word(text))
        if kind is None:
            problems.append(
                Problem(
                    row,
                    "kind",
                    f"unknown step kind {text!r}; use one of {', '.join(STEP_KINDS)} or a "
                    "word the mapping's kinds name",
                    column,
                )
            )
            return None
    fields = STEP_KINDS[kind].fields
    data: dict[str, Any] = {"kind": kind}
    columns: dict[str, str] = {}
    extra_notes: list[str] = []
    for name, value in constants.items():
        if name in fields or name in ("cleans", "notes"):
            data[name] = value
            columns[name] = "constant"
    for name, (text, column) in cells.items():
        if name == "kind" or not text:
            continue
        # A value the kind has no field for: kept in the notes, or passed on so the step check
        # rejects it by name ("is not a field of an anneal step").
        extra = name not in fields and name not in ("cleans", "notes")
        if extra and mapping.extra_values == "notes":
            extra_notes.append(f"{column.column}: {text}")
            continue
        spec = STEP_FIELD_SPECS.get(name)
        data[name] = _quantity_text(text, column, mapping) if isinstance(spec, Measure) else text
        columns[name] = column.column
    if extra_notes:
        # Kept word for word: the sheet said it, the step kind has no place for it.
        data["notes"] = "; ".join(t for t in (str(data.get("notes", "")), *extra_notes) if t)
    return _StepInput(row, label, data, columns)


def _read_rows(
    source: str | Path | io.TextIOBase, mapping: ImportMapping
) -> tuple[str, list[_Row]]:
    name, handle = _open_text(source, mapping.encoding)
    try:
        reader = csv.reader(handle, delimiter=mapping.delimiter)
        try:
            header_row = next(reader)
        except StopIteration:
            raise MappingError([f"{name} is empty: no header row"]) from None
        header: dict[str, int] = {}
        duplicated: set[str] = set()
        for index, title in enumerate(header_row):
            title = title.strip()
            if title in header:
                duplicated.add(title)
            header.setdefault(title, index)
        problems = [
            f"column {c.column!r} is not in the header of {name} (it has: "
            f"{', '.join(repr(h) for h in header if h)})"
            for c in mapping.all_columns
            if c.column not in header
        ]
        problems += [
            f"column {c.column!r} appears twice in the header"
            for c in mapping.all_columns
            if c.column in duplicated
        ]
        if problems:
            raise MappingError(sorted(set(problems)))
        rows: list[_Row] = []
        above: dict[str, tuple[str, Column]] = {}
        line = reader.line_num
        for record in reader:
            number, line = line + 1, reader.line_num
            if not any(cell.strip() for cell in record):
                continue
            cells = _cells(record, header, mapping.columns)
            for fill in mapping.fill_down:
                if fill in cells and not cells[fill][0] and fill in above:
                    cells[fill] = above[fill]
                elif fill in cells and cells[fill][0]:
                    above[fill] = cells[fill]
            prep_cells = {
                k: _Cell(v[0], v[1].column) for k, v in cells.items() if k in PREPARATION_FIELDS
            }
            for key, value in mapping.constants.items():
                if key in PREPARATION_FIELDS and not (key in prep_cells and prep_cells[key].text):
                    prep_cells[key] = _Cell(str(value), "")
            row = _Row(number, prep_cells, [])
            step_constants = {
                k: v for k, v in mapping.constants.items() if k not in PREPARATION_FIELDS
            }
            if mapping.layout == "row_per_step":
                step_cells = {k: v for k, v in cells.items() if k not in PREPARATION_FIELDS}
                step = _step_from_cells(
                    number,
                    "",
                    None,
                    step_cells.get("kind"),
                    step_cells,
                    step_constants,
                    mapping,
                    row.problems,
                )
                if step is not None:
                    row.steps.append(step)
            else:
                for index, template in enumerate(mapping.steps):
                    step_cells = _cells(record, header, template.columns)
                    if not any(text for text, _ in step_cells.values()):
                        continue
                    step = _step_from_cells(
                        number,
                        f"step {index + 1} ({template.kind})",
                        template.kind,
                        None,
                        step_cells,
                        {**step_constants, **template.constants},
                        mapping,
                        row.problems,
                    )
                    if step is not None:
                        row.steps.append(step)
                if not row.steps and not row.problems:
                    row.problems.append(Problem(number, "steps", "no step columns are filled in"))
            rows.append(row)
        return name, rows
    except csv.Error as exc:
        raise MappingError([f"{name}: not a readable CSV file ({exc})"]) from exc
    except UnicodeDecodeError as exc:
        raise MappingError(
            [f"{name}: not {mapping.encoding} text ({exc}); set the mapping's encoding"]
        ) from exc
    finally:
        if isinstance(source, str | Path):
            handle.close()


def _group_rows(rows: list[_Row], mapping: ImportMapping) -> list[list[_Row]]:
    if mapping.layout == "row_per_preparation" and not mapping.mapped("preparation"):
        return [[row] for row in rows]
    if mapping.mapped("preparation"):
        keys = ("preparation",)
    else:
        keys = ("sample", "instrument", "started_at", "date", "time")
    groups: dict[tuple[str, ...], list[_Row]] = {}
    for row in rows:
        key = tuple(row.cells[k].text if k in row.cells else "" for k in keys)
        if not any(key):
            # Nothing to group it by: it stands alone (and its blank fields are reported).
            key = (f"row {row.number}",)
        groups.setdefault(key, []).append(row)
    return list(groups.values())


# --- resolving a preparation's fields ---------------------------------------------------------


def _zone_for(mapping: ImportMapping, instrument: Instrument | None) -> ZoneInfo:
    name = mapping.time_zone or (instrument.time_zone if instrument else None) or settings.TIME_ZONE
    return ZoneInfo(name)


def parse_local_time(text: str, formats: Iterable[str], zone: ZoneInfo) -> datetime:
    """Read a date-time from the sheet: ISO 8601 first, then each format; a time without an
    offset is in ``zone``. Returns an aware UTC datetime; raises ``ValueError`` saying why."""
    text = " ".join(text.split())
    parsed: datetime | None = None
    try:
        # "2023-10-29 02:30 +01:00" as people write it; fromisoformat wants no space.
        parsed = datetime.fromisoformat(_SPACE_BEFORE_OFFSET.sub(r"\1", text))
    except ValueError:
        for fmt in formats:
            try:
                # strptime gives a naive datetime unless the format has %z; the zone of a
                # naive one is attached below, after the daylight-saving checks.
                parsed = datetime.strptime(text, fmt)  # noqa: DTZ007 - zone attached below
                break
            except ValueError:
                continue
    if parsed is None:
        tried = ", ".join(["ISO 8601", *formats])
        raise ValueError(f"cannot read {text!r} as a date and time (tried {tried})")
    if parsed.tzinfo is not None:
        return parsed.astimezone(UTC)
    earlier, later = parsed.replace(tzinfo=zone, fold=0), parsed.replace(tzinfo=zone, fold=1)
    if earlier.utcoffset() != later.utcoffset():
        back = earlier.astimezone(UTC).astimezone(zone).replace(tzinfo=None)
        what = "does not exist" if back != parsed else "happens twice"
        raise ValueError(
            f"{text} {what} in {zone.key} (a daylight-saving switch); write it with its UTC "
            "offset, e.g. '2023-10-29 02:30 +01:00'"
        )
    return earlier.astimezone(UTC)


def _find_user(text: str, mapping: ImportMapping):
    user_model = get_user_model()
    name = mapping.operators.get(text.strip().lower(), text.strip())
    user = user_model.objects.filter(username__iexact=name).first()
    if user is not None:
        return user
    first, _, last = name.partition(" ")
    if last:
        matches = list(
            user_model.objects.filter(first_name__iexact=first, last_name__iexact=last.strip())[:2]
        )
        if len(matches) == 1:
            return matches[0]
    return None


def _find_recipe(text: str) -> Recipe | None:
    match = _RECIPE_VERSION.match(text.strip())
    if match:
        found = Recipe.objects.filter(
            name__iexact=match["name"], version=int(match["version"])
        ).first()
        if found is not None:
            return found
    return (
        Recipe.objects.filter(name__iexact=text.strip(), retired_at__isnull=True)
        .order_by("-version")
        .first()
    )


@dataclass
class _Preparation:
    rows: list[_Row]
    steps: list[_StepInput]
    problems: list[Problem]
    sample: Sample | None = None
    sample_name: str = ""
    new_sample: tuple[str, str] | None = None
    instrument: Instrument | None = None
    instrument_name: str = ""
    started_at: datetime | None = None
    operator: Any = None
    recipe: Recipe | None = None
    notes: str = ""
    zone: str = "UTC"


def _shared_value(group: list[_Row], name: str, problems: list[Problem]) -> tuple[str, int, str]:
    """The value of a preparation field over its rows: the first non-blank one; a row that
    writes another value contradicts it. Returns (text, row number, column)."""
    chosen: tuple[str, int, str] | None = None
    for row in group:
        cell = row.cells.get(name)
        if cell is None or not cell.text:
            continue
        if chosen is None:
            chosen = (cell.text, row.number, cell.column)
        elif cell.text != chosen[0]:
            problems.append(
                Problem(
                    row.number,
                    name,
                    f"{cell.text!r} differs from {chosen[0]!r} on row {chosen[1]} of the same "
                    "preparation",
                    cell.column,
                )
            )
    return chosen or ("", group[0].number, _column_of(group[0], name))


def _column_of(row: _Row, name: str) -> str:
    cell = row.cells.get(name)
    return cell.column if cell else ""


def _resolve(
    group: list[_Row], mapping: ImportMapping, *, create_samples: bool, actor
) -> _Preparation:
    problems = [p for row in group for p in row.problems]
    prep = _Preparation(
        rows=group, steps=[s for row in group for s in row.steps], problems=problems
    )

    name, row, column = _shared_value(group, "instrument", problems)
    prep.instrument_name = name
    if not name:
        problems.append(Problem(row, "instrument", "is required", column))
    else:
        prep.instrument = Instrument.objects.filter(
            name__iexact=name, retired_at__isnull=True
        ).first()
        if prep.instrument is None:
            problems.append(Problem(row, "instrument", f"no instrument named {name!r}", column))

    name, row, column = _shared_value(group, "sample", problems)
    prep.sample_name = name
    if not name:
        problems.append(Problem(row, "sample", "is required", column))
    else:
        prep.sample = (
            Sample.objects.filter(name=name).first()
            or Sample.objects.filter(name__iexact=name).first()
        )
        if prep.sample is not None:
            prep.sample_name = prep.sample.name
        elif not create_samples:
            problems.append(
                Problem(
                    row,
                    "sample",
                    f"no sample named {name!r} in labbook; create it first, or import with "
                    "--create-samples and a substrate column",
                    column,
                )
            )
        else:
            substrate, _, _ = _shared_value(group, "substrate", problems)
            if not substrate:
                problems.append(
                    Problem(
                        row,
                        "substrate",
                        f"sample {name!r} is new: its substrate is needed to create it",
                        _column_of(group[0], "substrate"),
                    )
                )
            else:
                prep.new_sample = (name, substrate)

    zone = _zone_for(mapping, prep.instrument)
    prep.zone = zone.key
    # (has a time of day, instant) per row. A date filled down onto a step row without a time
    # is not that step's start: rows with a time win, a bare date counts only when no row of
    # the preparation has a time.
    starts: list[tuple[bool, datetime]] = []
    for row in group:
        if "started_at" in row.cells:
            cell = row.cells["started_at"]
            text, column, timed = cell.text, cell.column, True
        else:
            date_cell, time_cell = row.cells.get("date"), row.cells.get("time")
            if date_cell is None or not date_cell.text:
                text, column, timed = "", "", False
            else:
                timed = time_cell is not None and bool(time_cell.text)
                text = f"{date_cell.text} {time_cell.text}" if timed else date_cell.text
                column = ", ".join(c.column for c in (date_cell, time_cell) if c and c.column)
        if not text:
            continue
        try:
            starts.append((timed, parse_local_time(text, mapping.date_formats, zone)))
        except ValueError as exc:
            problems.append(Problem(row.number, "started_at", str(exc), column))
    if starts:
        timed_starts = [t for timed, t in starts if timed] or [t for _, t in starts]
        # Sheets that time every step: the preparation starts with its first.
        prep.started_at = min(timed_starts)
    elif not any(p.field == "started_at" for p in problems):
        problems.append(Problem(group[0].number, "started_at", "is required"))

    name, row, column = _shared_value(group, "operator", problems)
    if name:
        prep.operator = _find_user(name, mapping)
        if prep.operator is None:
            problems.append(
                Problem(
                    row,
                    "operator",
                    f"no account {name!r} (by username or first and last name); name it in "
                    "the mapping's operators",
                    column,
                )
            )
    else:
        prep.operator = actor

    name, row, column = _shared_value(group, "recipe", problems)
    if name:
        prep.recipe = _find_recipe(name)
        if prep.recipe is None:
            problems.append(Problem(row, "recipe", f"no recipe named {name!r}", column))

    notes = [r.cells["preparation_notes"].text for r in group if "preparation_notes" in r.cells]
    prep.notes = "; ".join(n for n in notes if n)

    for step in prep.steps:
        source = step.data.get("source")
        if source in (None, ""):
            continue
        text = str(source).strip()
        if prep.instrument is None:
            continue  # reported on the instrument already
        found = DepositionSource.objects.filter(instrument=prep.instrument, name__iexact=text)
        if text.isdigit():
            found = DepositionSource.objects.filter(
                Q(pk=int(text)) | Q(name__iexact=text), instrument=prep.instrument
            )
        source_record = found.first()
        if source_record is None:
            problems.append(
                Problem(
                    step.row,
                    _field_label(step, "source"),
                    f"no deposition source {text!r} on {prep.instrument}",
                    step.columns.get("source", ""),
                )
            )
        else:
            step.data["source"] = source_record.pk

    if mapping.cleaning == "last_anneal_after_sputter" and not any(
        "cleans" in s.data for s in prep.steps
    ):
        seen_sputter = False
        last_anneal = None
        for step in prep.steps:
            seen_sputter = seen_sputter or step.data["kind"] == "sputter"
            if step.data["kind"] == "anneal" and seen_sputter:
                last_anneal = step
        if last_anneal is not None:
            last_anneal.data["cleans"] = True
    return prep


def _field_label(step: _StepInput, name: str) -> str:
    return f"{step.label} {name}" if step.label else name


def _step_problems(prep: _Preparation, errors: Mapping[str, str]) -> list[Problem]:
    """StepErrors keyed ``steps.<i>.<field>`` back to the rows and columns they came from."""
    out = []
    for key, message in errors.items():
        parts = key.split(".", 2)
        if len(parts) == 3 and parts[0] == "steps" and parts[1].isdigit():
            step = prep.steps[int(parts[1])]
            out.append(
                Problem(
                    step.row,
                    _field_label(step, parts[2]),
                    message,
                    step.columns.get(parts[2], ""),
                )
            )
        else:
            out.append(Problem(prep.rows[0].number, key, message))
    return out


def _check_steps_alone(prep: _Preparation) -> list[Problem]:
    """The step checks that need no database, for a preparation that cannot be logged for
    another reason: the report then names every bad field at once. A deposit's calibrated
    rate needs the source's calibration at the preparation's time, so a source stands in for
    a rate here; the full check runs when the preparation itself is valid."""
    errors: dict[str, str] = {}
    for index, step in enumerate(prep.steps):
        data = dict(step.data)
        if data.get("source") not in (None, ""):
            data.pop("source")
            data.setdefault("rate_ml_per_min", 0)
        try:
            normalise_step(data)
        except StepErrors as exc:
            errors.update(exc.prefixed(f"steps.{index}").errors)
    return _step_problems(prep, errors)


def _validation_problems(prep: _Preparation, exc: ValidationError) -> list[Problem]:
    row = prep.rows[0].number
    if hasattr(exc, "error_dict"):
        return [
            Problem(row, name, "; ".join(str(m) for m in messages))
            for name, messages in exc.message_dict.items()
        ]
    return [Problem(row, "", "; ".join(exc.messages))]


def _outcome(prep: _Preparation, status: str, **extra: Any) -> PreparationOutcome:
    fields: dict[str, Any] = {
        "rows": [row.number for row in prep.rows],
        "sample": prep.sample_name,
        "instrument": prep.instrument.name if prep.instrument else prep.instrument_name,
        "started_at": prep.started_at,
        "steps": len(prep.steps),
        "new_sample": prep.new_sample,
        "zone": prep.zone,
        "status": status,
    }
    return PreparationOutcome(**(fields | extra))


def _reject(prep: _Preparation, problems: list[Problem]) -> PreparationOutcome:
    bad_rows = {p.row for p in problems} or {prep.rows[0].number}
    first_bad = min(bad_rows)
    for row in prep.rows:
        if row.number not in bad_rows:
            problems.append(
                Problem(
                    row.number,
                    "",
                    f"not imported: row {first_bad} of the same preparation was rejected",
                )
            )
    return _outcome(prep, REJECTED, problems=problems, steps=0)


def _import_one(
    prep: _Preparation, *, actor, committed: bool, seen: dict[tuple, list[int]]
) -> PreparationOutcome:
    if prep.problems:
        return _reject(prep, prep.problems + _check_steps_alone(prep))
    key = (prep.sample_name.lower(), prep.instrument.pk, prep.started_at)
    if key in seen:
        rows = ", ".join(str(r) for r in seen[key])
        return _outcome(
            prep, SKIPPED, reason=f"the same sample, instrument and start as rows {rows}"
        )
    seen[key] = [row.number for row in prep.rows]
    if prep.sample is not None:
        existing = Preparation.objects.filter(
            sample=prep.sample, instrument=prep.instrument, started_at=prep.started_at
        ).first()
        if existing is not None:
            return _outcome(
                prep,
                SKIPPED,
                reason=f"already in labbook (preparation {existing.pk})",
                preparation_id=existing.pk,
                new_sample=None,
            )
    try:
        # One preparation, one transaction: its new sample, the preparation and its steps,
        # all or nothing (inside a dry run this is a savepoint of the run's transaction).
        with transaction.atomic():
            sample = prep.sample
            if sample is None:
                name, substrate = prep.new_sample
                sample = actions.create_sample(name=name, substrate=substrate, actor=actor)
                prep.sample = sample
            preparation = actions.record_preparation(
                sample=sample,
                instrument=prep.instrument,
                started_at=prep.started_at,
                steps=[step.data for step in prep.steps],
                recipe=prep.recipe,
                operator=prep.operator,
                notes=prep.notes,
                actor=actor,
            )
    except StepErrors as exc:
        if prep.new_sample is not None:
            prep.sample = None
        return _reject(prep, _step_problems(prep, exc.errors))
    except ValidationError as exc:
        if prep.new_sample is not None:
            prep.sample = None
        return _reject(prep, _validation_problems(prep, exc))
    return _outcome(prep, IMPORTED if committed else WOULD_IMPORT, preparation_id=preparation.pk)


def import_preparations(
    source: str | Path | io.TextIOBase,
    mapping: ImportMapping,
    *,
    actor,
    commit: bool = False,
    create_samples: bool = False,
) -> ImportReport:
    """Read ``source`` (a path or an open text file) with ``mapping`` and log its preparations
    through :func:`actions.record_preparation` as ``actor``. Without ``commit`` it is a dry run:
    the same work in a transaction that is rolled back. Raises ``MappingError`` when the file
    cannot be read with the mapping (nothing is done); a bad row is reported, never raised."""
    require_member(actor)
    name, rows = _read_rows(source, mapping)
    report = ImportReport(source=name, committed=commit, rows_read=len(rows))
    seen: dict[tuple, list[int]] = {}
    if commit:
        for group in _group_rows(rows, mapping):
            prep = _resolve(group, mapping, create_samples=create_samples, actor=actor)
            report.outcomes.append(_import_one(prep, actor=actor, committed=True, seen=seen))
        return report
    with transaction.atomic():
        for group in _group_rows(rows, mapping):
            prep = _resolve(group, mapping, create_samples=create_samples, actor=actor)
            report.outcomes.append(_import_one(prep, actor=actor, committed=False, seen=seen))
        # A dry run leaves nothing behind: not the preparations, nor the samples made for them.
        transaction.set_rollback(True)
    return report


def read_mapping_file(path: str | Path) -> dict[str, Any]:
    """The JSON mapping file as a dict (``MappingError`` if it is not a JSON object)."""
    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise MappingError([f"cannot read the mapping {path}: {exc}"]) from exc
    if not isinstance(data, dict):
        raise MappingError([f"the mapping {path} must be a JSON object"])
    return data


__all__ = [
    "ImportMapping",
    "ImportReport",
    "MappingError",
    "PreparationOutcome",
    "Problem",
    "apply_options",
    "import_preparations",
    "load_mapping",
    "parse_local_time",
    "read_mapping_file",
]
