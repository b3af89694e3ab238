"""The pages of sessions, notes and the instrument's timeline.

The logbook page is ``queries.timeline`` with the page's filters, newest first, a page at a
time ("load older" asks htmx for the next page; without JavaScript it is a link). The note form
is reachable from every page (the "Note" button and the ``n`` key in ``web/base.html``): a
dialog loaded by htmx, or the page ``/logbook/note/`` without JavaScript.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

from django.contrib import messages
from django.core.exceptions import ValidationError
from django.http import HttpRequest, HttpResponse
from django.shortcuts import get_object_or_404, redirect, render
from django.urls import NoReverseMatch, reverse
from django.utils import timezone
from django.utils.http import url_has_allowed_host_and_scheme
from django.views.decorators.http import require_GET, require_http_methods

from labbook.accounts.permissions import lab_member_required
from labbook.instruments.models import Instrument
from labbook.instruments.queries import instruments_for
from labbook.logbook import actions, queries
from labbook.logbook.forms import (
    NoteForm,
    SessionEndForm,
    SessionStartForm,
    TimelineFilterForm,
    kind_name,
)
from labbook.samples.forms import lab_now_text, lab_zone
from labbook.tips.queries import tips
from labbook.tips.views import conditioning_view

PAGE = 50


def _instrument(request: HttpRequest, instrument_id: int) -> Instrument:
    return get_object_or_404(instruments_for(request.user), pk=instrument_id)


@lab_member_required
@require_GET
def logbook_index(request: HttpRequest) -> HttpResponse:
    """The logbook of the lab's first (usually only) instrument."""
    first = instruments_for(request.user).first()
    if first is None:
        return render(request, "logbook/no_instrument.html")
    url = reverse("logbook:instrument", args=[first.pk])
    return redirect(f"{url}?{request.GET.urlencode()}" if request.GET else url)


@lab_member_required
@require_GET
def logbook_page(request: HttpRequest, instrument_id: int) -> HttpResponse:
    instrument = _instrument(request, instrument_id)
    return render(request, "logbook/logbook.html", _page(request, instrument))


@lab_member_required
@require_GET
def entries_part(request: HttpRequest, instrument_id: int) -> HttpResponse:
    """htmx: the next page of entries ("load older"), or the first page again after a note."""
    instrument = _instrument(request, instrument_id)
    filters = TimelineFilterForm(request.GET)
    context = _entries(request, instrument, filters, continued=True)
    return render(request, "logbook/_entries.html", {"instrument": instrument, **context})


@lab_member_required
@require_http_methods(["POST"])
def start_session(request: HttpRequest, instrument_id: int) -> HttpResponse:
    instrument = _instrument(request, instrument_id)
    form = SessionStartForm(request.POST)
    if form.is_valid():
        try:
            session = actions.start_session(
                instrument,
                start=form.cleaned_data["start"],
                goal=form.cleaned_data["goal"].strip(),
                actor=request.user,
            )
        except ValidationError as exc:
            form.add_action_errors(exc)
        else:
            messages.success(
                request, f"Session started on {instrument} at {lab_time(session.start)}."
            )
            return redirect("logbook:instrument", instrument_id=instrument.pk)
    return render(request, "logbook/logbook.html", _page(request, instrument, start_form=form))


@lab_member_required
@require_http_methods(["POST"])
def end_session(request: HttpRequest, pk: int) -> HttpResponse:
    session = get_object_or_404(queries.sessions(), pk=pk)
    form = SessionEndForm(request.POST)
    if form.is_valid():
        try:
            ended = actions.end_session(
                session,
                end=form.cleaned_data["end"],
                summary=form.cleaned_data["summary"].strip(),
                actor=request.user,
            )
        except ValidationError as exc:
            form.add_action_errors(exc)
        else:
            messages.success(request, f"Session ended at {lab_time(ended.end)}.")
            return redirect("logbook:instrument", instrument_id=session.instrument_id)
    page = _page(request, session.instrument, end_form=form)
    return render(request, "logbook/logbook.html", page)


@lab_member_required
@require_http_methods(["GET", "POST"])
def note(request: HttpRequest) -> HttpResponse:
    """Write a note: a compact page, or (asked by htmx) the form alone for the dialog. Saved
    through ``write_note``, into the writer's open session on that instrument if there is one.
    """
    partial = request.headers.get("HX-Request") == "true"
    if request.method == "GET":
        form = NoteForm(user=request.user, initial=_note_initial(request))
    else:
        form = NoteForm(request.POST, user=request.user)
        if form.is_valid():
            saved = _save_note(request, form)
            if saved is not None:
                return saved
    template = "logbook/_note_form.html" if partial else "logbook/note.html"
    tip = _note_tip(form)
    return render(
        request,
        template,
        {"form": form, "in_dialog": partial, "note_tip_shown": tip, "focus": _focus(form)},
    )


def _save_note(request: HttpRequest, form: NoteForm) -> HttpResponse | None:
    data = form.cleaned_data
    instrument = data["instrument"]
    session = queries.open_session(instrument, request.user)
    try:
        written = actions.write_note(
            text=data["text"],
            at=data["at"],
            instrument=instrument,
            session=session,
            tip=data["tip"] if data["about_tip"] else None,
            actor=request.user,
        )
    except ValidationError as exc:
        form.add_action_errors(exc)
        return None
    where = f"the {instrument} logbook"
    message = f"Note added to {where} at {lab_time(written.at)}"
    message += ", in your open session." if session else "."
    logbook_url = reverse("logbook:instrument", args=[instrument.pk])
    if request.headers.get("HX-Request") == "true":
        # The dialog closes and says so; the page behind it (a half-typed form, say) stays.
        response = HttpResponse(status=204)
        response["HX-Trigger"] = json.dumps(
            {"labbook:note-saved": {"message": message, "url": logbook_url}}
        )
        return response
    messages.success(request, message)
    back = data.get("next") or ""
    if back and url_has_allowed_host_and_scheme(
        back, allowed_hosts={request.get_host()}, require_https=request.is_secure()
    ):
        return redirect(back)
    return redirect(logbook_url)


def _note_initial(request: HttpRequest) -> dict[str, Any]:
    """Prefilled from the page it was opened on: that page's instrument (else the writer's
    open session's, else the lab's only one) and the tip, when it was a tip's page."""
    initial: dict[str, Any] = {"at": lab_now_text(), "next": request.GET.get("next", "")}
    instruments = instruments_for(request.user)
    wanted = request.GET.get("instrument", "")
    chosen = instruments.filter(pk=int(wanted)).first() if wanted.isdigit() else None
    if chosen is None:
        open_session = queries.sessions(operator=request.user, open=True).first()
        chosen = open_session.instrument if open_session else None
    if chosen is None and instruments.count() == 1:
        chosen = instruments.first()
    if chosen is not None:
        initial["instrument"] = chosen.pk
    tip_id = request.GET.get("tip", "")
    if tip_id.isdigit() and tips().filter(pk=int(tip_id)).exists():
        initial["tip"] = int(tip_id)
        initial["about_tip"] = True
    return initial


def _note_tip(form: NoteForm):
    if form.is_bound:
        return form.cleaned_data.get("tip") if hasattr(form, "cleaned_data") else None
    tip_id = form.initial.get("tip")
    return tips().filter(pk=tip_id).first() if tip_id else None


def _focus(form: NoteForm) -> str:
    first = next((name for name in form.fields if name in form.errors), "")
    if first:
        return form[first].auto_id
    return form["text"].auto_id


# --- presenters -----------------------------------------------------------------------------


def lab_time(value) -> str:
    if value is None:
        return "—"
    return timezone.localtime(value, lab_zone()).strftime("%Y-%m-%d %H:%M %Z")


def _reverse(name: str, *args: Any, anchor: str = "") -> str:
    try:
        return reverse(name, args=args) + anchor
    except NoReverseMatch:  # an app whose pages are not mounted: no link, not an error
        return ""


def record_url(entry: queries.TimelineEntry) -> str:
    """The page of the record an entry comes from, where it has one."""
    record = entry.record
    kind = entry.record_type
    if kind == "samples.preparation":
        return _reverse("samples:preparation", record.pk)
    if kind == "samples.transfer":
        return _reverse("samples:sample", record.sample_id)
    if kind == "tips.tipmount":
        return _reverse("tips:tip", record.tip_id, anchor=f"#mount-{record.pk}")
    if kind == "tips.conditioning":
        return _reverse("tips:tip", record.tip_id, anchor=f"#conditioning-{record.pk}")
    if kind == "instruments.instrumentevent":
        return _reverse("instruments:event", record.pk)
    if kind == "logbook.note":
        if record.tip_id is not None:
            return _reverse("tips:tip", record.tip_id)
        if record.sample_id is not None:
            return _reverse("samples:sample", record.sample_id)
        return ""
    url = getattr(record, "get_absolute_url", None)
    return url() if callable(url) else ""


def entry_detail(entry: queries.TimelineEntry) -> str:
    """The line under an entry's title. Conditioning parameters are put in readable units
    ("Voltage -4.7 V, Duration 20 ms") rather than shown as stored ("voltage_v=-4.7")."""
    if entry.record_type == "tips.conditioning":
        view = conditioning_view(entry.record)
        params = ", ".join(f"{label} {value}" for label, value, _typed in view.params)
        return " — ".join(part for part in (params, entry.record.outcome) if part)
    return entry.detail


@dataclass
class EntryView:
    entry: queries.TimelineEntry
    kind_label: str
    url: str
    day: str
    day_label: str
    detail: str = ""
    new_day: bool = False

    @property
    def is_note(self) -> bool:
        return self.entry.kind == "note"


def entry_views(entries: list[queries.TimelineEntry], previous_day: str = "") -> list[EntryView]:
    zone = lab_zone()
    views = []
    for entry in entries:
        local = timezone.localtime(entry.at, zone)
        day = local.strftime("%Y-%m-%d")
        views.append(
            EntryView(
                entry=entry,
                kind_label=kind_name(entry.kind),
                detail=entry_detail(entry),
                url=record_url(entry),
                day=day,
                day_label=f"{local:%A} {local.day} {local:%B %Y}",
                new_day=day != previous_day,
            )
        )
        previous_day = day
    return views


def _entries(
    request: HttpRequest, instrument: Instrument, filters: TimelineFilterForm, *, continued: bool
) -> dict[str, Any]:
    offset_text = request.GET.get("offset", "")
    offset = int(offset_text) if offset_text.isdigit() else 0
    since, until = filters.window()
    found = queries.timeline(
        instrument,
        since,
        until,
        kinds=filters.kinds() or None,
        q=filters.text() or None,
        # One more than a page: whether it comes back says if there is an older page.
        limit=PAGE + 1,
        offset=offset,
    )
    more = len(found) > PAGE
    previous_day = request.GET.get("day", "") if continued else ""
    entries = entry_views(found[:PAGE], previous_day)
    next_offset = offset + PAGE if more else None
    context: dict[str, Any] = {
        "entries": entries,
        "offset": offset,
        "next_offset": next_offset,
        "continued": continued and offset > 0,
    }
    if next_offset is not None:
        query = request.GET.copy()
        query["offset"] = str(next_offset)
        query["day"] = entries[-1].day if entries else ""
        context["more_part_url"] = (
            f"{reverse('logbook:entries', args=[instrument.pk])}?{query.urlencode()}"
        )
        query.pop("day")
        context["more_page_url"] = (
            f"{reverse('logbook:instrument', args=[instrument.pk])}?{query.urlencode()}"
        )
    return context


def _page(
    request: HttpRequest,
    instrument: Instrument,
    *,
    start_form: SessionStartForm | None = None,
    end_form: SessionEndForm | None = None,
) -> dict[str, Any]:
    filters = TimelineFilterForm(request.GET or None)
    entries = _entries(request, instrument, filters, continued=False)
    mine = queries.open_session(instrument, request.user)
    others = [
        s
        for s in queries.sessions(instrument=instrument, open=True)
        if s.operator_id != request.user.pk
    ]
    now_text = lab_now_text()
    chosen = set(filters.kinds())
    first_page = reverse("logbook:instrument", args=[instrument.pk])
    query = request.GET.copy()
    query.pop("offset", None)
    entries_url = reverse("logbook:entries", args=[instrument.pk])
    here = request.get_full_path()
    return {
        "instrument": instrument,
        "page_instrument": instrument,
        "instruments": list(instruments_for(request.user)),
        "filters": filters,
        "kinds": [
            (value, label, value in chosen) for value, label in filters.fields["kind"].choices
        ],
        "q": filters.data.get("q", "") if filters.is_bound else "",
        "since_value": filters.data.get("since", "") if filters.is_bound else "",
        "until_value": filters.data.get("until", "") if filters.is_bound else "",
        "filtered": bool(
            request.GET.get("q") or chosen or request.GET.get("since") or request.GET.get("until")
        ),
        "first_page_url": f"{first_page}?{query.urlencode()}" if query else first_page,
        "refresh_url": f"{entries_url}?{query.urlencode()}",
        "my_session": mine,
        "other_sessions": others,
        "start_form": start_form or SessionStartForm(initial={"start": now_text}),
        "end_form": end_form or SessionEndForm(initial={"end": now_text}),
        "inline_note": NoteForm(
            user=request.user, initial={"instrument": instrument.pk, "next": here, "at": ""}
        ),
        **entries,
    }
