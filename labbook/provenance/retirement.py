"""Retirement, not deletion: a record a dataset depends on cannot be deleted (the dataset's
lineage would point at nothing); it is retired instead (``retired_at`` set), leaves the lists
of records in use, and still resolves wherever a dataset names it.

Where a dataset refers to the record by a protected key (its sample, tip, instrument,
preparation) Django's own ``ProtectedError`` refuses first. The receivers here cover what no
key protects: the mounts, conditioning, transfers, sessions, steps, events and channels a
dataset's lineage was resolved from. The admin mixin shows both as the reason a delete is
refused and offers a "retire" action instead.
"""

from __future__ import annotations

from datetime import UTC

from django.contrib import admin, messages
from django.db import models, transaction
from django.db.models import Q
from django.db.models.deletion import ProtectedError
from django.utils import timezone

from labbook.datafiles.models import AcquiredFile
from labbook.instruments.models import Chamber, Channel, Instrument, InstrumentEvent, Reading
from labbook.instruments.queries import AFTER_TRANSFER_WINDOW
from labbook.logbook.models import Session
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

#: How many dependent datasets an error names (the count says how many there are in all).
NAMED = 5


class RecordInUse(ProtectedError):
    """Deleting a record that datasets depend on; retire it instead."""

    def __init__(self, record: models.Model, files: list[AcquiredFile], total: int):
        self.record = record
        self.total = total
        names = ", ".join(describe_file(f) for f in files[:NAMED])
        more = f" and {total - NAMED} more" if total > NAMED else ""
        label = record._meta.verbose_name
        message = (
            f"{label} {record} cannot be deleted: {total} dataset{'s' if total != 1 else ''} "
            f"depend{'s' if total == 1 else ''} on it ({names}{more}). Retire it instead "
            "(set retired at): it leaves the lists in use and the datasets keep resolving."
        )
        super().__init__(message, set(files))


def describe_file(record: AcquiredFile) -> str:
    when = (
        ""
        if record.acquired_at is None
        else f", {record.acquired_at.astimezone(UTC):%Y-%m-%d %H:%M} UTC"
    )
    return f"dataset #{record.pk} {record.original_name}{when}"


def _window(start, end) -> Q:
    condition = Q(acquired_at__gte=start)
    if end is not None:
        condition &= Q(acquired_at__lt=end)
    return condition


def _next_cleaning_start(preparation: Preparation):
    return (
        Preparation.objects.filter(
            sample_id=preparation.sample_id,
            started_at__gt=preparation.started_at,
            retired_at__isnull=True,
            steps__cleans=True,
        )
        .order_by("started_at")
        .values_list("started_at", flat=True)
        .first()
    )


def dependents(record: models.Model) -> Q | None:
    """The datasets that depend on ``record``, as a filter on acquired files (None: the kind
    of record no dataset depends on)."""
    if isinstance(record, Sample):
        return Q(sample_id=record.pk)
    if isinstance(record, Tip):
        return Q(tip_id=record.pk) | Q(lineage__tip_state__tip=record.pk)
    if isinstance(record, Instrument):
        return Q(instrument_id=record.pk)
    if isinstance(record, Preparation):
        # Its own datasets, and every later one of the sample until the next cleaning: their
        # surface state counts its steps.
        return Q(preparation_id=record.pk) | (
            Q(sample_id=record.sample_id) & _window(record.started_at, _next_cleaning_start(record))
        )
    if isinstance(record, PreparationStep):
        return dependents(Preparation.objects.get(pk=record.preparation_id))
    if isinstance(record, Recipe):
        return Q(preparation__recipe_id=record.pk)
    if isinstance(record, DepositionSource):
        return Q(preparation__steps__source_id=record.pk)
    if isinstance(record, RateCalibration):
        return Q(preparation__steps__calibration_id=record.pk)
    if isinstance(record, TipMount):
        return Q(lineage__tip_state__mount=record.pk) | (
            Q(tip_id=record.tip_id, instrument_id=record.instrument_id)
            & _window(record.start, record.end)
        )
    if isinstance(record, Conditioning):
        mount = (
            TipMount.objects.filter(tip_id=record.tip_id, start__lte=record.at)
            .filter(Q(end__isnull=True) | Q(end__gt=record.at))
            .order_by("-start")
            .first()
        )
        if mount is None:
            return None
        return Q(tip_id=record.tip_id) & _window(record.at, mount.end)
    if isinstance(record, Transfer):
        following = (
            Transfer.objects.filter(sample_id=record.sample_id, at__gt=record.at)
            .order_by("at")
            .values_list("at", flat=True)
            .first()
        )
        return Q(sample_id=record.sample_id) & _window(record.at, following)
    if isinstance(record, Session):
        return Q(lineage__session=record.pk) | (
            Q(instrument_id=record.instrument_id, operator_id=record.operator_id)
            & _window(record.start, record.end)
        )
    if isinstance(record, InstrumentEvent):
        # The state snapshot lists the events under way or ended within the window before.
        end = None if record.end is None else record.end + AFTER_TRANSFER_WINDOW
        return Q(instrument_id=record.instrument_id) & _window(record.start, end)
    if isinstance(record, Channel | Chamber):
        channels = (
            [record.pk]
            if isinstance(record, Channel)
            else list(record.channels.values_list("pk", flat=True))
        )
        first = (
            Reading.objects.filter(channel_id__in=channels)
            .order_by("t")
            .values_list("t", flat=True)
            .first()
        )
        if first is None:
            return None
        return Q(instrument_id=record.instrument_id, acquired_at__gte=first)
    return None


def dependent_files(record: models.Model) -> tuple[list[AcquiredFile], int]:
    """The first datasets that depend on ``record`` and how many there are. Two queries."""
    condition = dependents(record)
    if condition is None:
        return [], 0
    files = AcquiredFile.objects.filter(condition).distinct()
    total = files.count()
    if not total:
        return [], 0
    named = list(
        files.only("id", "original_name", "acquired_at").order_by("acquired_at", "id")[:NAMED]
    )
    return named, total


def refuse_delete(sender, instance, **kwargs) -> None:
    """pre_delete: raise ``RecordInUse`` when datasets depend on the record."""
    files, total = dependent_files(instance)
    if total:
        raise RecordInUse(instance, files, total)


#: The records a dataset depends on; apps.py connects ``refuse_delete`` to each.
PROTECTED_MODELS: tuple[type[models.Model], ...] = (
    Sample,
    Preparation,
    PreparationStep,
    Recipe,
    DepositionSource,
    RateCalibration,
    Transfer,
    Tip,
    TipMount,
    Conditioning,
    Instrument,
    Chamber,
    Channel,
    InstrumentEvent,
    Session,
)


def retire(records, *, actor) -> int:
    """Retire records (set ``retired_at`` now) through ``save_record`` so the history names
    the actor; already retired ones are left as they are. Returns how many were retired."""
    from labbook.accounts.permissions import require_member
    from labbook.core.records import save_record

    require_member(actor)
    now = timezone.now()
    count = 0
    for record in records:
        if record.retired_at is not None:
            continue
        record.retired_at = now
        save_record(record, actor)
        count += 1
    return count


class RetireNotDeleteAdmin:
    """Admin mixin: a delete of a record that datasets depend on is refused on the usual
    "cannot delete" page, naming the datasets; the "retire" action retires instead.

    Put it before the admin base class:
    ``class TipAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin)``.
    """

    actions = ["retire_selected"]

    def get_deleted_objects(self, objs, request):
        deleted, counts, perms_needed, protected = super().get_deleted_objects(objs, request)
        protected = list(protected)
        for obj in objs:
            files, total = dependent_files(obj)
            if total:
                protected.append(str(RecordInUse(obj, files, total).args[0]))
        return deleted, counts, perms_needed, protected

    # The confirmation page already refuses; these catch a POST sent anyway (or a dataset
    # added meanwhile). The savepoint keeps the request's transaction usable after the refusal.
    def delete_model(self, request, obj):
        try:
            with transaction.atomic():
                super().delete_model(request, obj)
        except ProtectedError as exc:
            self.message_user(request, str(exc.args[0]), messages.ERROR)

    def delete_queryset(self, request, queryset):
        try:
            with transaction.atomic():
                super().delete_queryset(request, queryset)
        except ProtectedError as exc:
            self.message_user(request, str(exc.args[0]), messages.ERROR)

    @admin.action(description="Retire selected (kept, and still resolved by their datasets)")
    def retire_selected(self, request, queryset):
        count = retire(list(queryset), actor=request.user)
        self.message_user(
            request,
            f"{count} record{'s' if count != 1 else ''} retired; their datasets still name them.",
            messages.SUCCESS,
        )
