"""The audit side of provenance: who changed what and when (every record's history and the
lab-wide change log), the tip audit (every dataset a tip took and the state it was in), and
re-resolving the lineage of datasets when a record they depend on is corrected after the fact.

History rows come from django-simple-history (one table per record type); what changed in a
row is its difference from the previous row of the same record. Reading is done in a fixed
number of queries whatever the length of the history: one for the rows, one for their
predecessors, one per kind of linked record named in a change.
"""

from __future__ import annotations

import json
import logging
import threading
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from django.contrib.auth import get_user_model
from django.db import models, transaction
from django.db.models import Max, OuterRef, Q, Subquery, Value
from django.urls import reverse
from django.utils import timezone

from labbook.core import jobs
from labbook.core.records import save_record
from labbook.datafiles import lineage as file_lineage
from labbook.datafiles.actions import replace_coverages, store_lineage
from labbook.datafiles.models import AcquiredFile
from labbook.instruments.models import Chamber, Channel, Instrument, InstrumentEvent
from labbook.logbook.models import Note, Session
from labbook.provenance.tasks import RERESOLVE_JOB  # importing it registers the job handler
from labbook.samples.models import (
    DepositionSource,
    Preparation,
    PreparationStep,
    RateCalibration,
    Recipe,
    Sample,
    Transfer,
)
from labbook.tips.models import Conditioning, Tip, TipMount

log = logging.getLogger(__name__)

# Columns every row has and nobody corrects: showing them would make every change look alike.
_BOOKKEEPING = frozenset({"id", "created_at", "updated_at"})
#: Most rows a change-log page shows.
PAGE_SIZE = 50
#: Most datasets the tip audit and the set-of-datasets audit read at once.
MAX_AUDIT_FILES = 2000
#: Most datasets a correction re-resolves in the request that made it (~100 ms each); a larger
#: correction is re-resolved by a background job (tasks.py) so the page answers at once.
IMMEDIATE_RERESOLVE_LIMIT = 20


@dataclass(frozen=True)
class RecordType:
    """One kind of record in the change log: its model, a label and where its page is."""

    key: str
    label: str
    model: type[models.Model]


RECORD_TYPES: tuple[RecordType, ...] = (
    RecordType("sample", "sample", Sample),
    RecordType("transfer", "sample transfer", Transfer),
    RecordType("recipe", "recipe", Recipe),
    RecordType("preparation", "preparation", Preparation),
    RecordType("step", "preparation step", PreparationStep),
    RecordType("source", "deposition source", DepositionSource),
    RecordType("calibration", "rate calibration", RateCalibration),
    RecordType("tip", "tip", Tip),
    RecordType("mount", "tip mount", TipMount),
    RecordType("conditioning", "conditioning", Conditioning),
    RecordType("instrument", "instrument", Instrument),
    RecordType("chamber", "chamber", Chamber),
    RecordType("channel", "channel", Channel),
    RecordType("event", "instrument event", InstrumentEvent),
    RecordType("session", "session", Session),
    RecordType("note", "note", Note),
    RecordType("dataset", "dataset", AcquiredFile),
)
TYPES_BY_KEY = {t.key: t for t in RECORD_TYPES}
_KEY_OF_MODEL = {t.model: t.key for t in RECORD_TYPES}

# Records shown with the record whose page they live on: a tip's page shows the changes to its
# mounts and conditioning, a preparation's page those to its steps. (child model, its key to
# the parent)
_CHILDREN: dict[type[models.Model], tuple[tuple[type[models.Model], str], ...]] = {
    Tip: ((TipMount, "tip_id"), (Conditioning, "tip_id")),
    Sample: ((Transfer, "sample_id"),),
    Preparation: ((PreparationStep, "preparation_id"),),
    Instrument: ((Chamber, "instrument_id"), (Channel, "instrument_id")),
}


# --- one record's history --------------------------------------------------------------------


@dataclass(frozen=True)
class FieldChange:
    field: str
    label: str
    old: str
    new: str


@dataclass
class HistoryEntry:
    """One history row: who did what to which record, when, and the fields it changed."""

    at: datetime
    user: Any
    action: str  # created, changed, retired, restored, deleted
    type_key: str
    type_label: str
    record_id: int
    record_label: str
    url: str | None
    changes: list[FieldChange] = field(default_factory=list)
    reason: str = ""
    history_id: int = 0


def _label_of_row(row) -> str:
    """A short name for a record from its own history row (no query for linked records)."""
    for name in ("name", "original_name"):
        value = getattr(row, name, None)
        if value:
            return str(value)
    if isinstance(row, _history_model(Note)):
        text = (row.text or "").strip().splitlines()
        return (text[0][:60] if text else "") or f"note #{row.id}"
    if isinstance(row, _history_model(PreparationStep)):
        return f"step {row.position + 1} ({row.kind}) of preparation #{row.preparation_id}"
    when = getattr(row, "start", None) or getattr(row, "at", None)
    when = when or getattr(row, "started_at", None)
    suffix = (
        f" of {when.astimezone(timezone.get_default_timezone()):%Y-%m-%d %H:%M}" if when else ""
    )
    return f"#{row.id}{suffix}"


def _history_model(model: type[models.Model]):
    return model.history.model


def record_url(type_key: str, row) -> str | None:
    """The page a record is shown on (its own, or its parent's), from its history row."""
    pk = row.id
    if type_key == "sample":
        return reverse("samples:sample", args=[pk])
    if type_key == "transfer":
        return reverse("samples:sample", args=[row.sample_id])
    if type_key == "preparation":
        return reverse("samples:preparation", args=[pk])
    if type_key == "step":
        return reverse("samples:preparation", args=[row.preparation_id])
    if type_key == "tip":
        return reverse("tips:tip", args=[pk])
    if type_key == "mount":
        return reverse("tips:tip", args=[row.tip_id]) + f"#mount-{pk}"
    if type_key == "conditioning":
        return reverse("tips:tip", args=[row.tip_id]) + f"#conditioning-{pk}"
    if type_key == "instrument":
        return reverse("instruments:instrument", args=[pk])
    if type_key in ("chamber", "channel"):
        return reverse("instruments:instrument", args=[row.instrument_id])
    if type_key == "event":
        return reverse("instruments:event", args=[pk])
    if type_key in ("session", "note"):
        return reverse("logbook:instrument", args=[row.instrument_id])
    if type_key == "dataset":
        return reverse("datafiles:dataset", args=[pk])
    return None  # recipes, sources, calibrations: only in the setup pages


def _tracked_fields(model: type[models.Model]) -> list[models.Field]:
    return [f for f in model._meta.concrete_fields if f.name not in _BOOKKEEPING and f.editable]


def _format(value: Any, fld: models.Field, names: dict[tuple[type, Any], str]) -> str:
    """A stored value as people read it. Plain text: the template escapes it."""
    if value is None or value == "":
        return "—"
    if isinstance(fld, models.ForeignKey):
        return names.get((fld.related_model, value), f"#{value}")
    if fld.choices:
        return str(dict(fld.flatchoices).get(value, value))
    if isinstance(value, datetime):
        return value.astimezone(timezone.get_default_timezone()).strftime("%Y-%m-%d %H:%M:%S %Z")
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, dict | list):
        return json.dumps(value, ensure_ascii=False, sort_keys=True, default=str)
    return str(value)


#: Most keys named when a JSON field (a dataset's lineage, statistics, metadata) changes.
_KEYS_SHOWN = 6


def _size_text(value: Any) -> str:
    if isinstance(value, dict):
        return f"{len(value)} entr{'y' if len(value) == 1 else 'ies'}"
    if isinstance(value, list):
        return f"{len(value)} item{'' if len(value) == 1 else 's'}"
    return "—" if value in (None, "") else str(value)


def _format_pair(
    old: Any, new: Any, fld: models.Field, names: dict[tuple[type, Any], str]
) -> tuple[str, str]:
    """(was, now) as people read them. A JSON value (a lineage snapshot, statistics with a
    256-bin histogram) is not printed whole: its size, and which of its keys changed."""
    if not isinstance(old, dict | list) and not isinstance(new, dict | list):
        return _format(old, fld, names), _format(new, fld, names)
    if isinstance(old, dict) and isinstance(new, dict):
        keys = sorted(
            k for k in set(old) | set(new) if k not in old or k not in new or old[k] != new[k]
        )
        shown = ", ".join(keys[:_KEYS_SHOWN])
        more = f" and {len(keys) - _KEYS_SHOWN} more" if len(keys) > _KEYS_SHOWN else ""
        return _size_text(old), f"{_size_text(new)}; changed: {shown}{more}"
    return _size_text(old), _size_text(new)


def _action(row, previous) -> str:
    if row.history_type == "+":
        return "created"
    if row.history_type == "-":
        return "deleted"
    was = getattr(previous, "retired_at", None) if previous is not None else None
    now = getattr(row, "retired_at", None)
    if was is None and now is not None:
        return "retired"
    if was is not None and now is None:
        return "restored"
    return "changed"


def _diff(row, previous, model) -> list[tuple[models.Field, Any, Any]]:
    if previous is None:
        return []
    names = [f.name for f in _tracked_fields(model)]
    delta = row.diff_against(previous, included_fields=names)
    by_name = {f.name: f for f in _tracked_fields(model)}
    return [(by_name[c.field], c.old, c.new) for c in delta.changes if c.field in by_name]


def _link_names(diffs: list[tuple[models.Field, Any, Any]]) -> dict[tuple[type, Any], str]:
    """Names of the linked records a set of changes mentions: one query per linked model."""
    wanted: dict[type, set] = {}
    for fld, old, new in diffs:
        if isinstance(fld, models.ForeignKey):
            for value in (old, new):
                if value is not None:
                    wanted.setdefault(fld.related_model, set()).add(value)
    names: dict[tuple[type, Any], str] = {}
    User = get_user_model()  # noqa: N806
    for model, pks in wanted.items():
        if model is User:
            for user in User.objects.filter(pk__in=pks):
                names[(model, user.pk)] = user.get_full_name() or user.get_username()
            continue
        # Their names may read a required linked record (a preparation is named by its
        # sample): follow those in the same query.
        for obj in model._base_manager.filter(pk__in=pks).select_related():
            try:
                names[(model, obj.pk)] = str(obj)
            except Exception:  # noqa: BLE001 - a __str__ that reaches a linked record
                names[(model, obj.pk)] = f"#{obj.pk}"
    return names


def _entries(pairs: list[tuple[str, Any, Any]]) -> list[HistoryEntry]:
    """History entries from (type key, row, previous row) triples, linked names resolved in
    one query per linked model."""
    diffs_of = []
    for key, row, previous in pairs:
        diffs_of.append(_diff(row, previous, TYPES_BY_KEY[key].model))
    names = _link_names([d for diffs in diffs_of for d in diffs])
    entries = []
    for (key, row, previous), diffs in zip(pairs, diffs_of, strict=True):
        record_type = TYPES_BY_KEY[key]
        entries.append(
            HistoryEntry(
                at=row.history_date,
                user=row.history_user,
                action=_action(row, previous),
                type_key=key,
                type_label=record_type.label,
                record_id=row.id,
                record_label=_label_of_row(row),
                url=record_url(key, row),
                changes=[
                    FieldChange(
                        fld.name, str(fld.verbose_name), *_format_pair(old, new, fld, names)
                    )
                    for fld, old, new in diffs
                ],
                reason=row.history_change_reason or "",
                history_id=row.history_id,
            )
        )
    return entries


def _with_previous(rows: list) -> list[tuple[Any, Any]]:
    """Pair each row with the previous row of the same record (rows of several records)."""
    rows = sorted(rows, key=lambda r: (r.id, r.history_date, r.history_id))
    paired, last = [], {}
    for row in rows:
        paired.append((row, last.get(row.id)))
        last[row.id] = row
    return paired


def record_history(record: models.Model, *, limit: int = 200) -> list[HistoryEntry]:
    """Every change to ``record`` (and to the records shown on its page: a tip's mounts and
    conditioning, a preparation's steps …), newest first, at most ``limit`` entries.

    A fixed number of queries: one per record type shown (a child row moved from another
    parent, e.g. a mount corrected to the right tip, is shown on both parents' pages), and
    one per kind of linked record named in the changes.
    """
    model = type(record)
    key = _KEY_OF_MODEL[model]
    history = _history_model(model)
    pairs: list[tuple[str, Any, Any]] = [
        (key, row, prev)
        for row, prev in _with_previous(
            list(history.objects.filter(id=record.pk).select_related("history_user"))
        )
    ]
    for child, parent_key in _CHILDREN.get(model, ()):
        child_history = _history_model(child)
        ever_here = child_history.objects.filter(**{parent_key: record.pk}).values("id")
        rows = list(
            child_history.objects.filter(id__in=Subquery(ever_here)).select_related("history_user")
        )
        child_key = _KEY_OF_MODEL[child]
        for row, prev in _with_previous(rows):
            # Show the child's rows while it belonged here and the row that moved it away.
            if getattr(row, parent_key) == record.pk or (
                prev is not None and getattr(prev, parent_key) == record.pk
            ):
                pairs.append((child_key, row, prev))
    pairs.sort(key=lambda p: (p[1].history_date, p[1].history_id), reverse=True)
    return _entries(pairs[:limit])


# --- the lab-wide change log -------------------------------------------------------------------


@dataclass(frozen=True)
class ChangeFilter:
    """What the change log is narrowed to; every part optional."""

    user: int | None = None
    types: tuple[str, ...] = ()
    since: datetime | None = None
    until: datetime | None = None
    record: int | None = None  # with exactly one type: that record's rows


@dataclass(frozen=True)
class Cursor:
    """Where a page ends: the newest-first order is (time, type, history id), descending."""

    at: datetime
    type_key: str
    history_id: int

    def encode(self) -> str:
        return f"{self.at.isoformat()}~{self.type_key}~{self.history_id}"

    @classmethod
    def decode(cls, text: str) -> Cursor:
        """Raises ValueError naming the problem for a cursor that was not written here."""
        try:
            at_text, key, history_id = text.split("~")
            at = datetime.fromisoformat(at_text)
        except ValueError as exc:
            raise ValueError("after: not a page position written by this page") from exc
        if key not in TYPES_BY_KEY or at.tzinfo is None:
            raise ValueError("after: not a page position written by this page")
        return cls(at, key, int(history_id))


@dataclass
class ChangePage:
    entries: list[HistoryEntry]
    next_cursor: Cursor | None


def _branch(record_type: RecordType, wanted: ChangeFilter, after: Cursor | None):
    history = _history_model(record_type.model)
    rows = history.objects.all()
    if wanted.user is not None:
        rows = rows.filter(history_user_id=wanted.user)
    if wanted.since is not None:
        rows = rows.filter(history_date__gte=wanted.since)
    if wanted.until is not None:
        rows = rows.filter(history_date__lt=wanted.until)
    if wanted.record is not None:
        rows = rows.filter(id=wanted.record)
    if after is not None:
        # Keyset: strictly after the cursor in (time desc, type desc, history id desc).
        if record_type.key < after.type_key:
            rows = rows.filter(history_date__lte=after.at)
        elif record_type.key > after.type_key:
            rows = rows.filter(history_date__lt=after.at)
        else:
            rows = rows.filter(
                Q(history_date__lt=after.at)
                | Q(history_date=after.at, history_id__lt=after.history_id)
            )
    # The history tables order newest first by default; a UNION's parts must not be ordered.
    kind = Value(record_type.key, output_field=models.CharField())
    return (
        rows.order_by()
        .annotate(record_kind=kind)
        .values_list("history_date", "record_kind", "history_id")
    )


def change_page(
    wanted: ChangeFilter, *, after: Cursor | None = None, limit: int = PAGE_SIZE
) -> ChangePage:
    """One page of the lab's change log, newest first.

    One query picks the page's rows across every history table (a UNION ordered by time,
    type and id, so the next page starts exactly after this one whatever is added meanwhile),
    then per type on the page one query reads those rows and one their predecessors.
    """
    types = [TYPES_BY_KEY[k] for k in wanted.types] if wanted.types else list(RECORD_TYPES)
    limit = max(1, min(limit, 200))
    branches = [_branch(t, wanted, after) for t in types]
    union = branches[0].union(*branches[1:], all=True) if len(branches) > 1 else branches[0]
    picked = list(union.order_by("-history_date", "-record_kind", "-history_id")[: limit + 1])
    more = len(picked) > limit
    picked = picked[:limit]
    by_type: dict[str, list[int]] = {}
    for _, key, history_id in picked:
        by_type.setdefault(key, []).append(history_id)
    rows: dict[tuple[str, int], tuple[Any, Any]] = {}
    for key, ids in by_type.items():
        history = _history_model(TYPES_BY_KEY[key].model)
        earlier = (
            history.objects.filter(id=OuterRef("id"), history_id__lt=OuterRef("history_id"))
            .order_by()
            .values("id")
            .annotate(last=Max("history_id"))
            .values("last")
        )
        page_rows = list(
            history.objects.filter(history_id__in=ids)
            .annotate(audit_prior_row=Subquery(earlier))
            .select_related("history_user")
        )
        previous = {
            r.history_id: r
            for r in history.objects.filter(
                history_id__in=[r.audit_prior_row for r in page_rows if r.audit_prior_row]
            )
        }
        for row in page_rows:
            rows[(key, row.history_id)] = (row, previous.get(row.audit_prior_row))
    pairs = [(key, *rows[(key, hid)]) for _, key, hid in picked if (key, hid) in rows]
    entries = _entries(pairs)
    last = picked[-1] if picked else None
    next_cursor = Cursor(last[0], last[1], last[2]) if more and last else None
    return ChangePage(entries, next_cursor)


# --- the tip audit ------------------------------------------------------------------------------


@dataclass
class StateGroup:
    """The datasets a tip took in one state: one mount, with the conditioning done so far."""

    mount: TipMount | None
    events: list[Conditioning]
    files: list[AcquiredFile] = field(default_factory=list)
    stale: list[int] = field(default_factory=list)  # files whose stored tip state differs

    @property
    def last_event(self) -> Conditioning | None:
        return self.events[-1] if self.events else None


@dataclass
class TipAudit:
    tip: Tip
    groups: list[StateGroup]
    outside: list[AcquiredFile]  # named this tip explicitly but taken in none of its mounts
    others_in_mounts: list[AcquiredFile]  # taken during its mounts but naming another tip
    total: int
    truncated: bool


def _state_key(mount: TipMount | None, events: list[Conditioning]) -> tuple:
    return (None if mount is None else mount.pk, tuple(e.pk for e in events))


def _states_for(
    files: list[AcquiredFile], mounts: list[TipMount], events: list[Conditioning]
) -> dict[int, tuple[TipMount | None, list[Conditioning]]]:
    """The tip state each file was taken in, computed from the records (not from what was
    stored), the same way ``tips.queries.tip_state`` does, without a query per file."""
    found = {}
    for record in files:
        at = record.acquired_at
        mount = None
        for candidate in mounts:
            if candidate.tip_id == record.tip_id and candidate.covers(at):
                mount = candidate
        since = (
            []
            if mount is None
            else [e for e in events if e.tip_id == record.tip_id and mount.start <= e.at <= at]
        )
        found[record.pk] = (mount, since)
    return found


def _stored_differs(record: AcquiredFile, mount, since) -> bool:
    stored = (record.lineage or {}).get("tip_state") or {}
    stored_events = [e.get("id") for e in stored.get("events", [])]
    return stored.get("mount") != (None if mount is None else mount.pk) or stored_events != [
        e.pk for e in since
    ]


_FILE_COLUMNS = (
    "id",
    "original_name",
    "acquired_at",
    "kind",
    "bias_v",
    "setpoint_a",
    "tip_id",
    "instrument_id",
    "sample_id",
    "lineage",
    "retired_at",
)


def tip_audit(tip: Tip) -> TipAudit:
    """Every dataset ``tip`` took, grouped by the tip state it was in (mount and conditioning
    since), oldest first; plus the datasets that name it outside its mounts and those taken
    during its mounts that name another tip (a wrong tip logged). Five queries."""
    mounts = list(
        TipMount.objects.filter(tip=tip, retired_at__isnull=True)
        .select_related("instrument")
        .order_by("start", "pk")
    )
    events = list(
        Conditioning.objects.filter(tip=tip, retired_at__isnull=True).order_by("at", "pk")
    )
    taken = (
        AcquiredFile.objects.filter(tip=tip, acquired_at__isnull=False)
        .only(*_FILE_COLUMNS)
        .order_by("acquired_at", "id")
    )
    files = list(taken[: MAX_AUDIT_FILES + 1])
    truncated = len(files) > MAX_AUDIT_FILES
    files = files[:MAX_AUDIT_FILES]
    states = _states_for(files, mounts, events)
    groups: dict[tuple, StateGroup] = {}
    outside = []
    for record in files:
        mount, since = states[record.pk]
        if mount is None:
            outside.append(record)
            continue
        group = groups.setdefault(_state_key(mount, since), StateGroup(mount, since))
        group.files.append(record)
        if _stored_differs(record, mount, since):
            group.stale.append(record.pk)
    during = Q(pk__in=[])
    for mount in mounts:
        window = Q(instrument_id=mount.instrument_id, acquired_at__gte=mount.start)
        if mount.end is not None:
            window &= Q(acquired_at__lt=mount.end)
        during |= window
    others = (
        list(
            AcquiredFile.objects.filter(during)
            .exclude(tip=tip)
            .select_related("tip")
            .only(*_FILE_COLUMNS, "tip__name")
            .order_by("acquired_at", "id")[:200]
        )
        if mounts
        else []
    )
    ordered = sorted(
        groups.values(),
        key=lambda g: (g.mount.start, len(g.events)),
    )
    return TipAudit(
        tip=tip,
        groups=ordered,
        outside=outside,
        others_in_mounts=others,
        total=len(files),
        truncated=truncated,
    )


@dataclass
class FileTip:
    file: AcquiredFile
    tip: Tip | None
    mount: TipMount | None
    events: list[Conditioning]
    stale: bool


@dataclass
class TipUse:
    tip: Tip
    files: list[FileTip]


def tips_of_files(files: models.QuerySet[AcquiredFile] | list[int]) -> tuple[list[TipUse], list]:
    """The tips a set of datasets was taken with, each with its datasets and the tip state of
    each (mount and conditioning since), and the datasets with no tip. Four queries."""
    if not isinstance(files, models.QuerySet):
        files = AcquiredFile.objects.filter(pk__in=list(files))
    rows = list(
        files.select_related("tip")
        .only(*_FILE_COLUMNS, *(f"tip__{f}" for f in ("name", "material", "origin", "retired_at")))
        .order_by("acquired_at", "id")[:MAX_AUDIT_FILES]
    )
    tip_ids = {r.tip_id for r in rows if r.tip_id is not None}
    mounts = list(
        TipMount.objects.filter(tip_id__in=tip_ids, retired_at__isnull=True)
        .select_related("instrument")
        .order_by("start", "pk")
    )
    events = list(
        Conditioning.objects.filter(tip_id__in=tip_ids, retired_at__isnull=True).order_by(
            "at", "pk"
        )
    )
    with_time = [r for r in rows if r.tip_id is not None and r.acquired_at is not None]
    states = _states_for(with_time, mounts, events)
    uses: dict[int, TipUse] = {}
    untipped = []
    for record in rows:
        if record.tip_id is None:
            untipped.append(record)
            continue
        mount, since = states.get(record.pk, (None, []))
        use = uses.setdefault(record.tip_id, TipUse(record.tip, []))
        use.files.append(
            FileTip(record, record.tip, mount, since, _stored_differs(record, mount, since))
        )
    return sorted(uses.values(), key=lambda u: u.tip.name), untipped


# --- re-resolving lineage after a correction ----------------------------------------------------

_pending = threading.local()


def _pending_ids() -> dict[int, tuple[Any, str]]:
    if not hasattr(_pending, "files"):
        _pending.files = {}
    return _pending.files


def _window(start: datetime | None, end: datetime | None) -> Q:
    if start is None:
        return Q(pk__in=[])
    condition = Q(acquired_at__gte=start)
    if end is not None:
        condition &= Q(acquired_at__lt=end)
    return condition


def _old_and_new(instance: models.Model) -> tuple[Any, Any]:
    """The record's previous and current history rows (post_save runs after simple_history
    wrote the new one)."""
    rows = list(instance.history.order_by("-history_id")[:2])
    new = rows[0] if rows else None
    old = rows[1] if len(rows) > 1 else None
    return old, new


# The fields of each record that lineage is resolved from: a change to any other (a note, a
# label) re-resolves nothing.
_LINEAGE_FIELDS: dict[type[models.Model], frozenset[str]] = {
    TipMount: frozenset({"tip", "instrument", "start", "end", "retired_at"}),
    Conditioning: frozenset({"tip", "instrument", "kind", "at", "params", "retired_at"}),
    Transfer: frozenset({"sample", "at", "location", "instrument", "retired_at"}),
    Preparation: frozenset({"sample", "instrument", "started_at", "retired_at"}),
    Session: frozenset({"instrument", "operator", "start", "end", "retired_at"}),
}


def _lineage_changed(model: type[models.Model], old, new) -> bool:
    if old is None:
        return True
    if model is PreparationStep:
        # Every value of a step counts (coverage, exposure, cleaning); its words do not.
        names = [f.name for f in _tracked_fields(model) if f.name not in ("notes", "description")]
    else:
        names = sorted(_LINEAGE_FIELDS[model])
    return bool(new.diff_against(old, included_fields=names).changes)


def _moved_window(old, new, *, start: str, end: str, same: tuple[str, ...]) -> Q:
    """The datasets whose lineage a period's change can touch: those in the old or the new
    period, less those in both when only the period's ends moved (closing an open mount at
    the next tip's start touches only what came after, not the whole stay)."""
    versions = [v for v in (old, new) if v is not None]
    union = Q(pk__in=[])
    for v in versions:
        union |= _window(getattr(v, start), getattr(v, end))
    if old is None or any(getattr(old, k) != getattr(new, k) for k in same):
        return union
    if old.retired_at != new.retired_at:
        return union
    later_start = max(getattr(old, start), getattr(new, start))
    ends = [e for e in (getattr(old, end), getattr(new, end)) if e is not None]
    both = _window(later_start, min(ends) if ends else None)
    return union & ~both


def affected_files(model: type[models.Model], instance: models.Model) -> Q | None:
    """Which datasets' lineage may change because ``instance`` was created, corrected or
    retired: the windows of time its old and its new values cover. None when nothing the
    lineage is resolved from changed."""
    old, new = _old_and_new(instance)
    if new is None or not _lineage_changed(model, old, new):
        return None
    versions = [v for v in (old, new) if v is not None]
    condition = Q(pk__in=[])
    if model is TipMount:
        moved = _moved_window(old, new, start="start", end="end", same=("tip_id", "instrument_id"))
        places = Q(pk__in=[])
        for v in versions:
            places |= Q(instrument_id=v.instrument_id) | Q(tip_id=v.tip_id)
        condition = (places & moved) | Q(lineage__tip_state__mount=instance.pk)
    elif model is Conditioning:
        for v in versions:
            mount = (
                TipMount.objects.filter(tip_id=v.tip_id, start__lte=v.at, retired_at__isnull=True)
                .filter(Q(end__isnull=True) | Q(end__gt=v.at))
                .order_by("-start")
                .first()
            )
            if mount is not None:
                condition |= Q(tip_id=v.tip_id) & _window(v.at, mount.end)
    elif model is Transfer:
        for v in versions:
            nxt = (
                Transfer.objects.filter(sample_id=v.sample_id, at__gt=v.at, retired_at__isnull=True)
                .order_by("at")
                .values_list("at", flat=True)
                .first()
            )
            condition |= Q(sample_id=v.sample_id) & _window(v.at, nxt)
            if v.instrument_id is not None:
                condition |= Q(instrument_id=v.instrument_id) & _window(v.at, nxt)
    elif model is Preparation:
        for v in versions:
            condition |= Q(sample_id=v.sample_id) & _window(v.started_at, None)
    elif model is PreparationStep:
        starts = Preparation.objects.filter(pk=instance.preparation_id).values_list(
            "sample_id", "started_at"
        )
        for sample_id, started_at in starts:
            condition |= Q(sample_id=sample_id) & _window(started_at, None)
    elif model is Session:
        moved = _moved_window(
            old, new, start="start", end="end", same=("instrument_id", "operator_id")
        )
        places = Q(pk__in=[])
        for v in versions:
            places |= Q(instrument_id=v.instrument_id)
        condition = places & moved
    else:
        return None
    return condition


def reresolve_affected_files(model: type[models.Model], instance: models.Model) -> int:
    """Mark for re-resolution the datasets whose lineage ``instance`` may change; they are
    resolved again once the transaction commits, so a correction made of several saves (a
    mount that closes the previous one) is resolved once, against the final records.

    Returns how many datasets were marked. Each re-resolved dataset that changes gets a
    history row naming the actor of the correction and the record corrected. More than
    ``IMMEDIATE_RERESOLVE_LIMIT`` datasets are handed to a durable background job instead.
    """
    condition = affected_files(model, instance)
    if condition is None:
        return 0
    _, new = _old_and_new(instance)
    actor = None if new is None else new.history_user
    label = TYPES_BY_KEY[_KEY_OF_MODEL[model]].label
    reason = f"lineage resolved again after {label} #{instance.pk} changed"
    ids = list(
        AcquiredFile.objects.filter(condition)
        .filter(status=AcquiredFile.Status.READY, acquired_at__isnull=False)
        .values_list("pk", flat=True)
    )
    if not ids:
        return 0
    if len(ids) > IMMEDIATE_RERESOLVE_LIMIT:
        # The job row is written in this transaction and queued after commit, so it runs
        # against the final records, and a broker outage leaves it for the sweep.
        jobs.enqueue(
            RERESOLVE_JOB,
            {
                "model": model._meta.label,
                "pk": instance.pk,
                "files": ids,
                "actor": getattr(actor, "pk", None),
                "reason": reason,
            },
            actor=actor,
        )
        return len(ids)
    pending = _pending_ids()
    for file_id in ids:
        pending[file_id] = (actor, reason)
    transaction.on_commit(_flush)
    return len(ids)


def _flush() -> None:
    pending = _pending_ids()
    work = dict(pending)
    pending.clear()
    for file_id, (actor, reason) in sorted(work.items()):
        try:
            reresolve_file(file_id, actor=actor, reason=reason)
        except Exception:  # noqa: BLE001 - one dataset never stops the others
            log.exception("could not re-resolve the lineage of file %s", file_id)


def _lineage_tuple(record: AcquiredFile) -> tuple:
    return (
        record.instrument_id,
        record.operator_id,
        record.sample_id,
        record.preparation_id,
        record.tip_id,
        record.coverage_ml,
        json.dumps(record.lineage, sort_keys=True, default=str),
    )


@transaction.atomic
def reresolve_file(file_id: int, *, actor=None, reason: str = "") -> bool:
    """Resolve one dataset's lineage again from the records as they are now; saved (with a
    history row) only when something changed. True when it changed."""
    record = AcquiredFile.objects.select_for_update().filter(pk=file_id).first()
    if record is None or record.acquired_at is None:
        return False
    before = _lineage_tuple(record)
    found = file_lineage.resolve(
        acquired_at=record.acquired_at,
        metadata=record.given_metadata,
        instrument=record.instrument,
        uploaded_by=record.uploaded_by,
    )
    resolved_at = record.lineage_resolved_at
    store_lineage(record, found)
    if _lineage_tuple(record) == before:
        record.lineage_resolved_at = resolved_at
        return False
    record._change_reason = reason[:100]
    if actor is not None and getattr(actor, "is_authenticated", False):
        save_record(record, actor)
    else:
        record._history_user = None
        record.save()
    replace_coverages(record, found.coverages)
    return True


#: The records whose correction re-resolves the datasets they touch (apps.py connects them).
RERESOLVED_BY: tuple[type[models.Model], ...] = (
    TipMount,
    Conditioning,
    Transfer,
    Preparation,
    PreparationStep,
    Session,
)
