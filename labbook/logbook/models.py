"""Tables of sessions and notes. The instrument's timeline has no table of its own: it is
composed from the other apps' records (``labbook.logbook.queries.timeline``)."""

from __future__ import annotations

from django.conf import settings
from django.db import models
from django.db.models import Q

from labbook.core.models import LabRecord


class Session(LabRecord):
    """A stretch of work on an instrument by one operator, with what they set out to do:
    the unit a page of the paper logbook stands for. Open (no end) while it lasts."""

    instrument = models.ForeignKey(
        "instruments.Instrument", on_delete=models.PROTECT, related_name="sessions"
    )
    operator = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="sessions"
    )
    start = models.DateTimeField()
    end = models.DateTimeField(null=True, blank=True, help_text="open while the session lasts")
    goal = models.TextField(blank=True, help_text="e.g. CO on Cu(111): find single molecules")
    summary = models.TextField(blank=True, help_text="what came of it, written at the end")

    class Meta:
        ordering = ["-start"]
        indexes = [
            models.Index(fields=["instrument", "start"], name="session_instrument_start"),
        ]
        constraints = [
            models.CheckConstraint(
                condition=Q(end__isnull=True) | Q(end__gt=models.F("start")),
                name="session_ends_after_start",
                violation_error_message="a session ends after it starts",
            ),
            # Backs up the action's check when two requests open a session at once.
            models.UniqueConstraint(
                fields=["instrument", "operator"],
                condition=Q(end__isnull=True, retired_at__isnull=True),
                name="session_one_open_per_operator",
                violation_error_message="this operator already has a session open here",
            ),
        ]

    def __str__(self) -> str:
        return f"{self.instrument} · {self.operator} from {self.start:%Y-%m-%d %H:%M}"

    @property
    def is_open(self) -> bool:
        return self.end is None


class Note(LabRecord):
    """A timestamped free-text entry in an instrument's logbook, written in a session and/or
    about one record (a sample or a tip; datasets later).

    The text is Markdown source stored exactly as typed; pages show it escaped, so nothing
    typed into a note ever runs in a browser.
    """

    at = models.DateTimeField()
    text = models.TextField()
    author = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="logbook_notes"
    )
    # Every note belongs to one instrument's logbook, also a note about a sample or a tip.
    instrument = models.ForeignKey(
        "instruments.Instrument", on_delete=models.PROTECT, related_name="logbook_notes"
    )
    session = models.ForeignKey(
        Session, null=True, blank=True, on_delete=models.PROTECT, related_name="notes"
    )
    # The record the note is about, at most one of them. Explicit nullable keys rather than a
    # generic relation, so "every note on this tip" is a plain indexed filter.
    sample = models.ForeignKey(
        "samples.Sample",
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="logbook_notes",
    )
    tip = models.ForeignKey(
        "tips.Tip", null=True, blank=True, on_delete=models.PROTECT, related_name="logbook_notes"
    )

    class Meta:
        ordering = ["-at"]
        indexes = [models.Index(fields=["instrument", "at"], name="note_instrument_at")]
        constraints = [
            models.CheckConstraint(
                condition=Q(sample__isnull=True) | Q(tip__isnull=True),
                name="note_about_one_record",
                violation_error_message="a note is about one record: a sample or a tip",
            ),
        ]

    def __str__(self) -> str:
        first_line = self.text.strip().splitlines()[0] if self.text.strip() else ""
        return f"{self.at:%Y-%m-%d %H:%M} {first_line[:60]}"

    @property
    def about(self):
        """The record the note is about, if any."""
        return self.sample or self.tip
