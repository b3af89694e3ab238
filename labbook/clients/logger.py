"""labbook logger client: sends a chamber PC's gauge and thermometer readings to labbook.

One file, standard library only, Python 3.8 or newer, so it can be copied onto an old chamber
PC as it is (``python logger.py --help``); in a labbook checkout it also runs as
``python -m labbook.clients.logger``. docs/logger-client.md is the manual.

Sources: a CSV export (``--csv``), a log file followed like ``tail -F`` (``--follow``), or
lines on standard input (``--stdin``). Readings are posted in batches to
``POST /api/v1/readings``.

Nothing is lost, nothing is doubled. Every batch is first appended to the spool (JSON lines,
fsync'd) and only then sent; it leaves the spool only after a 2xx answer. The server stores
the same (channel, t) once, so a batch sent twice (a timeout after the server had stored it,
a client killed before it noted the answer) costs nothing. The state file records which spool
entries are delivered and how far a followed log has been read.

Exit status: 0 everything delivered; 1 something is still in the spool (the next run sends
it); 2 stopped (bad configuration, token refused, wrong URL); 3 everything was sent but some
rows were rejected (see the rejected log).
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import http.client
import json
import logging
import math
import os
import queue
import random
import re
import signal
import ssl
import sys
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from email.utils import parsedate_to_datetime
from typing import Any

try:  # Python 3.9+; on 3.8 naive times need --utc-offset instead of --time-zone
    import zoneinfo
except ImportError:  # pragma: no cover - exercised on Python 3.8 only
    zoneinfo = None  # type: ignore[assignment]

try:  # POSIX: one client per state directory
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]

try:  # Windows: the same lock through msvcrt
    import msvcrt
except ImportError:
    msvcrt = None  # type: ignore[assignment]

# datetime.UTC exists only from Python 3.11; this file must run on 3.8.
UTC = timezone.utc  # noqa: UP017

PROGRAM = "labbook-logger"
USER_AGENT = f"{PROGRAM}/1 (Python {sys.version_info[0]}.{sys.version_info[1]})"
SERVER_MAX_BATCH = 50_000  # labbook.instruments.readings.MAX_BATCH
SPOOL_FORMAT = 1

EXIT_OK = 0
EXIT_PENDING = 1
EXIT_STOPPED = 2
EXIT_REJECTED = 3

log = logging.getLogger(PROGRAM)


class Stop(Exception):
    """The client cannot go on (configuration, a refused token, a wrong URL); says why."""


class RowError(ValueError):
    """One row or cell that cannot be made into a reading on this side."""


class Unreachable(Exception):
    """The server could not take the batch now; it stays in the spool and is sent later."""

    def __init__(self, reason: str, retry_after: float | None = None):
        super().__init__(reason)
        self.retry_after = retry_after


def utc_now_text() -> str:
    return format_instant(datetime.now(UTC))


def format_instant(instant: datetime) -> str:
    return instant.astimezone(UTC).isoformat().replace("+00:00", "Z")


# --- time -----------------------------------------------------------------------------------

# datetime.fromisoformat() on 3.8-3.10 refuses "Z", "T" variants and short fractions, which
# loggers write all the time; this covers the common ISO 8601 forms on every Python.
_ISO = re.compile(
    r"(\d{4})-(\d{2})-(\d{2})"
    r"(?:[T ](\d{2}):(\d{2})(?::(\d{2})(?:[.,](\d+))?)?)?"
    r"\s*(Z|UTC|GMT|[+-]\d{2}(?::?\d{2})?)?",
    re.IGNORECASE,
)
_OFFSET = re.compile(r"([+-])(\d{1,2})(?::?(\d{2}))?")


def parse_offset(text: str) -> timezone:
    match = _OFFSET.fullmatch(text.strip())
    if not match:
        raise ValueError(f"{text!r} is not a UTC offset such as +01:00 or -0500")
    hours, minutes = int(match.group(2)), int(match.group(3) or 0)
    if hours > 23 or minutes > 59:
        raise ValueError(f"{text!r} is not a UTC offset such as +01:00 or -0500")
    sign = -1 if match.group(1) == "-" else 1
    return timezone(sign * timedelta(hours=hours, minutes=minutes))


def parse_iso(text: str) -> datetime:
    """An ISO 8601 date-time, aware when the text carries a zone, naive otherwise."""
    match = _ISO.fullmatch(text.strip())
    if not match:
        raise RowError(f"{text!r} is not an ISO 8601 time")
    year, month, day, hour, minute, second, fraction, zone = match.groups()
    micro = int((fraction or "0")[:6].ljust(6, "0"))
    try:
        value = datetime(  # noqa: DTZ001 - the zone, when written, is attached just below
            int(year),
            int(month),
            int(day),
            int(hour or 0),
            int(minute or 0),
            int(second or 0),
            micro,
        )
    except ValueError as exc:
        raise RowError(f"{text!r} is not a valid time: {exc}") from None
    if zone:
        tz = UTC if zone.upper() in ("Z", "UTC", "GMT") else parse_offset(zone)
        value = value.replace(tzinfo=tz)
    return value


class TimeReader:
    """Reads a time cell as an aware UTC instant: ISO 8601, epoch seconds or milliseconds, or
    a strftime pattern; naive times are put in the configured zone."""

    def __init__(self, fmt: str = "iso", zone: Any = None):
        self.fmt = fmt
        self.zone = zone
        self._last: datetime | None = None

    def parse(self, raw: Any) -> datetime:
        if isinstance(raw, bool) or raw is None:
            raise RowError("the time is missing")
        if self.fmt in ("epoch", "epoch-ms"):
            try:
                number = float(raw)
                if self.fmt == "epoch-ms":
                    number /= 1000.0
                instant = datetime.fromtimestamp(number, tz=UTC)
            except (TypeError, ValueError, OverflowError, OSError):
                raise RowError(f"{raw!r} is not a time in {self.fmt} seconds") from None
            self._last = instant
            return instant
        if not isinstance(raw, str):
            raise RowError(f"{raw!r} is not a time: expected text")
        if self.fmt == "iso":
            value = parse_iso(raw)
        else:
            try:
                # A pattern without %z gives a naive time; the zone is applied just below.
                value = datetime.strptime(raw.strip(), self.fmt)  # noqa: DTZ007
            except ValueError:
                raise RowError(f"{raw!r} does not match --time-format {self.fmt!r}") from None
        if value.tzinfo is None:
            if self.zone is None:
                raise RowError(
                    f"{raw!r} has no time zone: give --time-zone NAME or --utc-offset +01:00"
                )
            value = self._localize(value)
        instant = value.astimezone(UTC)
        self._last = instant
        return instant

    def _localize(self, naive: datetime) -> datetime:
        first = naive.replace(tzinfo=self.zone)
        second = naive.replace(tzinfo=self.zone, fold=1)
        # The hour repeated when summer time ends: a log that runs forward in time has moved
        # into the second pass once the first reading of the hour would lie before the last.
        ambiguous = first.utcoffset() != second.utcoffset()
        if ambiguous and self._last is not None and first.astimezone(UTC) < self._last:
            return second
        return first


def zone_from_args(name: str | None, offset: str | None) -> Any:
    if name and offset:
        raise Stop("give either --time-zone or --utc-offset, not both")
    if offset:
        try:
            return parse_offset(offset)
        except ValueError as exc:
            raise Stop(f"--utc-offset: {exc}") from None
    if not name:
        return None
    if name.upper() in ("UTC", "Z", "GMT"):
        return UTC
    if zoneinfo is None:
        raise Stop(
            "--time-zone needs Python 3.9 or newer (zoneinfo); on this Python give "
            "--utc-offset +01:00 instead, or export times with their zone"
        )
    try:
        return zoneinfo.ZoneInfo(name)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise Stop(
            f"unknown time zone {name!r}; on Windows install the tzdata package, "
            "or give --utc-offset"
        ) from None


# --- values and the mapping of columns to channels ------------------------------------------

_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
_DECIMAL_COMMA = re.compile(r"^(\s*[+-]?\d*),(\d)")
_NOT_FINITE = {"nan", "+nan", "-nan", "inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"}


def cell_value(text: str, unit: str = "", decimal_comma: bool = False) -> Any:
    """A cell as the value the server takes: a number, or text with a unit. A bare number in a
    column with a unit gets that unit; text that already has one is passed on for the server
    to convert (or to reject, with its reason). None for an empty cell."""
    text = text.strip()
    if not text:
        return None
    if decimal_comma:
        text = _DECIMAL_COMMA.sub(r"\1.\2", text, count=1)
    if text.lower() in _NOT_FINITE:
        raise RowError(f"{text!r} is not a finite number")
    if _NUMBER.fullmatch(text):
        number = float(text)
        if not math.isfinite(number):
            raise RowError(f"{text!r} is not a finite number")
        return f"{text} {unit}" if unit else number
    return text


def json_value(value: Any, unit: str = "") -> Any:
    if isinstance(value, bool) or value is None:
        raise RowError("the value must be a number or text with a unit")
    if isinstance(value, (int, float)):
        if not math.isfinite(value):
            raise RowError(f"{value!r} is not a finite number")
        return f"{value!r} {unit}" if unit else value
    if isinstance(value, str):
        converted = cell_value(value, unit)
        if converted is None:
            raise RowError("the value is empty")
        return converted
    raise RowError("the value must be a number or text with a unit")


@dataclass(frozen=True)
class Target:
    channel: int
    unit: str = ""


def parse_map(specs: list[str]) -> dict[str, Target]:
    """``COLUMN=CHANNEL_ID`` or ``COLUMN=CHANNEL_ID:UNIT``; the column name may hold '=' and ':'
    (only the last '=' separates), the unit may not."""
    mapping: dict[str, Target] = {}
    for spec in specs:
        name, sep, target = spec.rpartition("=")
        channel_text, _, unit = target.partition(":")
        if not sep or not name.strip() or not channel_text.strip().isdigit():
            raise Stop(f"--map {spec!r}: write COLUMN=CHANNEL_ID or COLUMN=CHANNEL_ID:UNIT")
        mapping[name.strip()] = Target(int(channel_text), unit.strip())
    return mapping


class RowMapper:
    """Turns parsed rows (CSV fields or JSON objects) into readings ``{channel, t, value}``.

    Two layouts: *long*, one reading a row (``t,channel,value``; the channel an id or a name
    given with --map), and *wide*, a time column and one column a channel (the columns named
    with --map). A header row decides which; without one, line sources read ``t,channel,value``.
    """

    def __init__(
        self,
        mapping: dict[str, Target],
        times: TimeReader,
        *,
        time_column: str | None = None,
        decimal_comma: bool = False,
        reject=None,
    ):
        self.mapping = mapping
        self.times = times
        self.time_column = time_column
        self.decimal_comma = decimal_comma
        self.reject = reject or (lambda **_: None)
        self.header: list[str] | None = None
        self.layout = "long"
        self._time_index, self._channel_index, self._value_index = 0, 1, 2
        self._cells: list[tuple[int, str, Target]] = []
        self._told: set[str] = set()

    # The header --------------------------------------------------------------------------
    def set_header(self, fields: list[str], *, strict: bool) -> None:
        names = [name.strip() for name in fields]
        lowered = [name.lower() for name in names]
        if self.time_column is not None:
            if self.time_column not in names:
                raise Stop(
                    f"--time-column {self.time_column!r} is not among the columns "
                    f"{', '.join(map(repr, names))}"
                )
            time_index = names.index(self.time_column)
        elif "t" in lowered:
            time_index = lowered.index("t")
        elif "time" in lowered:
            time_index = lowered.index("time")
        else:
            time_index = 0
        self._time_index = time_index
        self.header = names
        if "channel" in lowered and "value" in lowered:
            self.layout = "long"
            self._channel_index = lowered.index("channel")
            self._value_index = lowered.index("value")
            return
        self.layout = "wide"
        self._cells = [
            (index, name, self.mapping[name])
            for index, name in enumerate(names)
            if name in self.mapping and index != time_index
        ]
        missing = sorted(set(self.mapping) - set(names))
        if not self._cells:
            raise Stop(
                "no column is mapped to a channel: give --map 'COLUMN=CHANNEL_ID' for the "
                f"columns {', '.join(repr(n) for i, n in enumerate(names) if i != time_index)}"
            )
        if missing:
            message = f"--map names columns that are not in the header: {', '.join(missing)}"
            if strict:
                raise Stop(message)
            log.warning("%s", message)
        skipped = [
            name
            for index, name in enumerate(names)
            if index != time_index and name and name not in self.mapping
        ]
        if skipped:
            self._tell_once("columns without --map are skipped: " + ", ".join(skipped))
        log.debug("header: time column %r, channels %s", names[time_index], self._cells)

    def is_header(self, fields: list[str]) -> bool:
        names = {name.strip() for name in fields}
        lowered = {name.lower() for name in names}
        if {"channel", "value"} <= lowered:
            return True
        if self.time_column is not None and self.time_column in names:
            return not self._is_time(fields[0])
        return bool(names & set(self.mapping)) and not self._is_time(fields[0])

    def _is_time(self, text: str) -> bool:
        probe = TimeReader(self.times.fmt, self.times.zone or UTC)
        try:
            probe.parse(text)
        except RowError:
            return False
        return True

    # Rows ---------------------------------------------------------------------------------
    def from_fields(self, fields: list[str], where: str, line: str) -> list[dict[str, Any]]:
        if self.layout == "long":
            needed = max(self._time_index, self._channel_index, self._value_index)
            if len(fields) <= needed:
                self.reject(where=where, error="expected t,channel,value (or a header)", line=line)
                return []
            try:
                target = self._target(fields[self._channel_index].strip())
                instant = self.times.parse(fields[self._time_index])
                value = cell_value(fields[self._value_index], target.unit, self.decimal_comma)
                if value is None:
                    raise RowError("the value is empty")
            except RowError as exc:
                self.reject(where=where, error=str(exc), line=line)
                return []
            return [reading(target.channel, instant, value)]
        if len(fields) <= self._time_index:
            self.reject(where=where, error="the row has no time column", line=line)
            return []
        try:
            instant = self.times.parse(fields[self._time_index])
        except RowError as exc:
            self.reject(where=where, error=str(exc), line=line)
            return []
        rows = []
        for index, name, target in self._cells:
            if index >= len(fields):
                continue
            try:
                value = cell_value(fields[index], target.unit, self.decimal_comma)
            except RowError as exc:
                self.reject(where=f"{where}, column {name!r}", error=str(exc), line=line)
                continue
            if value is not None:
                rows.append(reading(target.channel, instant, value))
        return rows

    def from_json(self, obj: Any, where: str, line: str) -> list[dict[str, Any]]:
        if not isinstance(obj, dict):
            self.reject(where=where, error="a JSON line must be an object", line=line)
            return []
        time_key = self.time_column or "t"
        try:
            if "channel" in obj:
                target = self._target(obj["channel"])
                instant = self.times.parse(obj.get(time_key, obj.get("t")))
                return [reading(target.channel, instant, json_value(obj.get("value"), target.unit))]
            instant = self.times.parse(obj.get(time_key))
        except RowError as exc:
            self.reject(where=where, error=str(exc), line=line)
            return []
        rows = []
        for key, raw in obj.items():
            if key == time_key:
                continue
            target = self.mapping.get(key)
            if target is None:
                self._tell_once(f"keys without --map are skipped: {key}")
                continue
            try:
                rows.append(reading(target.channel, instant, json_value(raw, target.unit)))
            except RowError as exc:
                self.reject(where=f"{where}, key {key!r}", error=str(exc), line=line)
        return rows

    def _target(self, channel: Any) -> Target:
        if isinstance(channel, int) and not isinstance(channel, bool):
            return Target(channel)
        if isinstance(channel, str):
            text = channel.strip()
            if text in self.mapping:
                return self.mapping[text]
            if text.isdigit():
                return Target(int(text))
        raise RowError(f"channel {channel!r} is neither a channel id nor a name given with --map")

    def _tell_once(self, message: str) -> None:
        if message not in self._told:
            self._told.add(message)
            log.info("%s", message)


def reading(channel: int, instant: datetime, value: Any) -> dict[str, Any]:
    return {"channel": channel, "t": format_instant(instant), "value": value}


# --- files written safely -------------------------------------------------------------------


def fsync_directory(path: str) -> None:
    """Make a rename durable; directories cannot be opened for this on Windows."""
    if os.name != "posix":
        return
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_atomically(path: str, data: bytes) -> None:
    """Write a new file beside the old one and rename it over: a crash leaves one or the other,
    never half of each."""
    temporary = path + ".tmp"
    with open(temporary, "wb") as handle:
        handle.write(data)
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(temporary, path)
    fsync_directory(os.path.dirname(os.path.abspath(path)))


class StateFile:
    """Small JSON file: the last delivered spool entry and the followed log's position."""

    def __init__(self, path: str):
        self.path = path
        self.data: dict[str, Any] = {}
        if os.path.exists(path):
            try:
                with open(path, encoding="utf-8") as handle:
                    loaded = json.load(handle)
                if not isinstance(loaded, dict):
                    raise ValueError("not an object")
                self.data = loaded
            except (OSError, ValueError) as exc:
                # Starting over is safe: the spool is resent (the server drops what it has)
                # and a followed log is read again from its start.
                aside = path + ".unreadable"
                os.replace(path, aside)
                log.warning("state file %s was unreadable (%s); kept as %s", path, exc, aside)

    @property
    def delivered_seq(self) -> int:
        value = self.data.get("delivered_seq", 0)
        return value if isinstance(value, int) else 0

    def save(self) -> None:
        payload = json.dumps(self.data, indent=1, sort_keys=True) + "\n"
        write_atomically(self.path, payload.encode("utf-8"))


class Spool:
    """The outbox: one JSON line a batch, ``{"v", "seq", "spooled_at", "source", "rows"}``.

    A batch is appended and fsync'd before it is sent. Delivered entries are recorded in the
    state file as the highest delivered ``seq`` (so delivering a batch costs one small write,
    not a rewrite of the spool), and dropped when the spool is compacted: the entries still
    pending are written to a new file that is renamed over the old one. Seqs only grow, so a
    crash at any point leaves at worst a delivered entry that is sent again.
    """

    COMPACT_BYTES = 8 * 1024 * 1024

    def __init__(self, path: str, delivered_seq: int):
        self.path = path
        self._pending: list[tuple[int, int, int, int]] = []  # seq, offset, length, rows
        self._bad: list[bytes] = []
        self._size = 0
        self._torn = False
        self._next_seq = delivered_seq + 1
        self._load(delivered_seq)

    def _load(self, delivered_seq: int) -> None:
        if not os.path.exists(self.path):
            return
        offset = 0
        with open(self.path, "rb") as handle:
            for raw in handle:
                entry = None
                if raw.endswith(b"\n"):
                    try:
                        entry = json.loads(raw.decode("utf-8"))
                    except ValueError:
                        entry = None
                valid = (
                    isinstance(entry, dict)
                    and isinstance(entry.get("seq"), int)
                    and isinstance(entry.get("rows"), list)
                )
                if valid:
                    seq = entry["seq"]
                    self._next_seq = max(self._next_seq, seq + 1)
                    if seq > delivered_seq:
                        self._pending.append((seq, offset, len(raw), len(entry["rows"])))
                elif raw.endswith(b"\n"):
                    self._bad.append(raw)
                    log.warning(
                        "spool %s: an unreadable entry at byte %d is set aside", self.path, offset
                    )
                else:
                    # A torn last line: the client died while appending. The batch was never
                    # sent and its source position never saved, so it is read again.
                    self._torn = True
                    log.warning("spool %s: a partly written last entry is dropped", self.path)
                offset += len(raw)
        self._size = offset

    @property
    def pending_batches(self) -> int:
        return len(self._pending)

    @property
    def pending_rows(self) -> int:
        return sum(entry[3] for entry in self._pending)

    def append(self, rows: list[dict[str, Any]], source: str) -> int:
        seq = self._next_seq
        entry = {
            "v": SPOOL_FORMAT,
            "seq": seq,
            "spooled_at": utc_now_text(),
            "source": source,
            "rows": rows,
        }
        line = json.dumps(entry, separators=(",", ":"), allow_nan=False).encode("utf-8") + b"\n"
        with open(self.path, "ab") as handle:
            if self._torn:
                # End the torn fragment so the new entry starts on its own line.
                handle.write(b"\n")
                self._size += 1
                self._torn = False
            handle.write(line)
            handle.flush()
            os.fsync(handle.fileno())
        self._pending.append((seq, self._size, len(line), len(rows)))
        self._size += len(line)
        self._next_seq = seq + 1
        return seq

    def head(self) -> tuple[int, list[dict[str, Any]]] | None:
        if not self._pending:
            return None
        seq, offset, length, _ = self._pending[0]
        with open(self.path, "rb") as handle:
            handle.seek(offset)
            entry = json.loads(handle.read(length).decode("utf-8"))
        return seq, entry["rows"]

    def delivered(self, seq: int) -> None:
        if self._pending and self._pending[0][0] == seq:
            self._pending.pop(0)

    def compact_if_worth_it(self, *, force: bool = False) -> None:
        if self._torn or self._bad:
            force = True
        if not self._size:
            return
        live = sum(entry[2] for entry in self._pending)
        dead = self._size - live
        if not self._pending or force or (dead > self.COMPACT_BYTES and dead > live):
            self.compact()

    def compact(self) -> None:
        if self._bad:
            with open(self.path + ".bad", "ab") as handle:
                handle.writelines(self._bad)
                handle.flush()
                os.fsync(handle.fileno())
            log.warning("%d unreadable spool entries moved to %s.bad", len(self._bad), self.path)
        chunks: list[bytes] = []
        if self._pending:
            with open(self.path, "rb") as handle:
                for _, offset, length, _ in self._pending:
                    handle.seek(offset)
                    chunks.append(handle.read(length))
        write_atomically(self.path, b"".join(chunks))
        position, rebuilt = 0, []
        for seq, _, length, rows in self._pending:
            rebuilt.append((seq, position, length, rows))
            position += length
        self._pending, self._bad, self._size, self._torn = rebuilt, [], position, False


class RejectLog:
    """JSON lines, one rejected row each: ``{"at", "stage", "where", "error", "row"|"line"}``.

    ``stage`` is ``client`` (the row could not be read here) or ``server`` (labbook refused it,
    with its reason). A ``row`` can be fed back with ``--stdin`` once its cause is fixed."""

    def __init__(self, path: str):
        self.path = path
        self.count = 0
        self._handle = None
        self._unsynced = False

    def write(self, *, stage: str, where: str, error: str, row=None, line=None) -> None:
        entry: dict[str, Any] = {
            "at": utc_now_text(),
            "stage": stage,
            "where": where,
            "error": error,
        }
        if row is not None:
            entry["row"] = row
        if line is not None:
            entry["line"] = line
        if self._handle is None:
            self._handle = open(self.path, "a", encoding="utf-8")  # noqa: SIM115 - kept open
        self._handle.write(json.dumps(entry, ensure_ascii=False) + "\n")
        self._unsynced = True
        self.count += 1
        if self.count <= 5:
            log.warning("rejected (%s) %s: %s", stage, where, error)
        elif self.count == 6:
            log.warning("more rejected rows: see %s", self.path)

    def sync(self) -> None:
        if self._handle is not None and self._unsynced:
            self._handle.flush()
            os.fsync(self._handle.fileno())
            self._unsynced = False

    def close(self) -> None:
        if self._handle is not None:
            self.sync()
            self._handle.close()
            self._handle = None


class DirectoryLock:
    """One client per state directory: two would send and drop each other's spool entries."""

    def __init__(self, directory: str):
        self.path = os.path.join(directory, "lock")
        self._handle = None

    def acquire(self) -> None:
        handle = open(self.path, "a+")  # noqa: SIM115 - held for the life of the process
        try:
            if fcntl is not None:
                fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
            elif msvcrt is not None:  # pragma: no cover - Windows
                handle.seek(0)
                msvcrt.locking(handle.fileno(), msvcrt.LK_NBLCK, 1)
        except OSError:
            handle.close()
            raise Stop(
                f"another logger client is using {os.path.dirname(self.path)}; "
                "give each running client its own --state-dir"
            ) from None
        handle.seek(0)
        handle.truncate()
        handle.write(f"{os.getpid()}\n")
        handle.flush()
        self._handle = handle

    def release(self) -> None:
        if self._handle is not None:
            self._handle.close()
            self._handle = None


# --- sources ----------------------------------------------------------------------------------


class CsvExport:
    """A whole CSV export, its first row the header unless --columns gives it."""

    def __init__(
        self,
        path: str,
        mapper: RowMapper,
        *,
        encoding: str,
        delimiter: str,
        skip_lines: int,
        columns: list[str] | None,
    ):
        self.label = f"csv {os.path.basename(path)}"
        self.done = False
        self._name = os.path.basename(path)
        try:
            self._handle = open(path, newline="", encoding=encoding)  # noqa: SIM115 - read by polls
        except OSError as exc:
            raise Stop(f"cannot read {path}: {exc.strerror or exc}") from None
        for _ in range(skip_lines):
            self._handle.readline()
        self._rows = csv.reader(self._handle, delimiter=delimiter)
        self._mapper = mapper
        self._delimiter = delimiter
        self._skip_lines = skip_lines
        self._line = skip_lines
        if columns:
            mapper.set_header(columns, strict=True)
        else:
            for fields in self._next_rows():
                mapper.set_header(fields, strict=True)
                break
            else:
                raise Stop(f"{path} has no header row")

    def _next_rows(self):
        while True:
            try:
                fields = next(self._rows)
            except StopIteration:
                return
            except UnicodeDecodeError as exc:
                raise Stop(
                    f"{self._name} line {self._line + 1} is not {self._handle.encoding}: {exc}; "
                    "give --encoding (e.g. latin-1)"
                ) from None
            except csv.Error as exc:
                raise Stop(f"{self._name} line {self._line + 1}: {exc}") from None
            self._line = self._skip_lines + self._rows.line_num
            if not fields or not any(cell.strip() for cell in fields):
                continue
            if fields[0].lstrip().startswith("#"):
                continue
            yield fields

    def poll(self, limit: int) -> list[dict[str, Any]]:
        rows: list[dict[str, Any]] = []
        for count, fields in enumerate(self._next_rows(), start=1):
            rows.extend(
                self._mapper.from_fields(
                    fields, f"{self._name} line {self._line}", self._delimiter.join(fields)
                )
            )
            if count >= limit:
                return rows
        self.done = True
        self._handle.close()
        return rows

    def position(self) -> dict[str, Any] | None:
        return None


def split_line(line: str, delimiter: str) -> tuple[str, Any] | None:
    """("json", object) or ("fields", [...]) for a line of a log or of stdin; None to skip."""
    text = line.strip()
    if not text or text.startswith("#"):
        return None
    if text.startswith("{"):
        try:
            return "json", json.loads(text)
        except ValueError as exc:
            return "bad", f"not valid JSON: {exc}"
    try:
        return "fields", next(csv.reader([text], delimiter=delimiter))
    except (csv.Error, StopIteration) as exc:
        return "bad", f"not a CSV line: {exc}"


class LineSource:
    """Shared by --follow and --stdin: lines are JSON objects or CSV lines, and a header line
    (seen in the stream, or remembered in the state, or given by --columns) sets the layout."""

    label = "lines"
    done = False

    def __init__(self, mapper: RowMapper, delimiter: str):
        self._mapper = mapper
        self._delimiter = delimiter

    def rows_of(self, line: str, where: str) -> list[dict[str, Any]]:
        parsed = split_line(line, self._delimiter)
        if parsed is None:
            return []
        kind, content = parsed
        if kind == "bad":
            self._mapper.reject(where=where, error=content, line=line)
            return []
        if kind == "json":
            return self._mapper.from_json(content, where, line)
        if self._mapper.is_header(content):
            self._mapper.set_header(content, strict=False)
            log.info("%s: header %s", where, ",".join(content))
            return []
        return self._mapper.from_fields(content, where, line)


class LogFollower(LineSource):
    """Follows a growing log like ``tail -F``: reads complete lines as they are written,
    survives rotation (the file renamed and a new one created) and truncation (copytruncate),
    and saves its position (file identity, byte offset, a fingerprint of the file's first
    bytes) so that a restarted client neither resends nor skips."""

    HEAD = 1024

    def __init__(
        self,
        path: str,
        mapper: RowMapper,
        *,
        delimiter: str,
        encoding: str,
        saved: dict[str, Any] | None,
        start_at_end: bool,
        once: bool = False,
    ):
        super().__init__(mapper, delimiter)
        self.once = once  # --once: done at the end of what the log holds now
        self.path = os.path.abspath(path)
        self.label = f"follow {os.path.basename(path)}"
        self._encoding = encoding
        self._handle = None
        self._ident: tuple[int, int] | None = None
        self._offset = 0  # bytes of the open file consumed up to the end of the last line
        self._partial = b""
        self._head = b""
        self._draining = False  # the open file is the rotated one: the live file comes next
        self._waiting_logged = False
        saved = saved if saved and saved.get("path") == self.path else None
        if saved and saved.get("header"):
            mapper.set_header(saved["header"], strict=False)
        self._resume(saved, start_at_end)

    # Opening and resuming ---------------------------------------------------------------
    def _open(self, path: str, offset: int = 0) -> bool:
        try:
            handle = open(path, "rb")  # noqa: SIM115 - followed for the life of the source
        except FileNotFoundError:
            return False
        stat = os.fstat(handle.fileno())
        if self._handle is not None:
            self._handle.close()
        self._handle = handle
        self._ident = (stat.st_dev, stat.st_ino)
        self._head = handle.read(min(offset, self.HEAD)) if offset else b""
        handle.seek(offset)
        self._offset = offset
        self._partial = b""
        return True

    def _matches(self, path: str, saved: dict[str, Any]) -> bool:
        """The saved position belongs to the file at ``path``: same identity, long enough, and
        the same first bytes (an inode is reused once the rotated file is deleted)."""
        try:
            stat = os.stat(path)
            if [stat.st_dev, stat.st_ino] != saved.get("ident") or stat.st_size < int(
                saved["offset"]
            ):
                return False
            with open(path, "rb") as handle:
                head = handle.read(int(saved.get("head_length", 0)))
        except (OSError, KeyError, TypeError, ValueError):
            return False
        return hashlib.sha256(head).hexdigest() == saved.get("head_sha256")

    def _resume(self, saved: dict[str, Any] | None, start_at_end: bool) -> None:
        if saved and self._matches(self.path, saved):
            self._open(self.path, saved["offset"])
            log.info("following %s from byte %d (saved position)", self.path, self._offset)
            return
        if saved:
            # Rotated while the client was stopped: finish the old file where it now lives.
            directory = os.path.dirname(self.path)
            for entry in sorted(os.listdir(directory)):
                candidate = os.path.join(directory, entry)
                if (
                    candidate != self.path
                    and os.path.isfile(candidate)
                    and self._matches(candidate, saved)
                ):
                    self._open(candidate, saved["offset"])
                    self._draining = True
                    log.info(
                        "%s was rotated while stopped: finishing %s from byte %d first",
                        self.path,
                        candidate,
                        self._offset,
                    )
                    return
            log.warning(
                "the saved position in %s no longer matches (truncated, or rotated "
                "away): reading it from the start",
                self.path,
            )
        if self._open(self.path):
            if start_at_end and not saved:
                self._open(self.path, os.fstat(self._handle.fileno()).st_size)
            log.info("following %s from byte %d", self.path, self._offset)

    # Reading ------------------------------------------------------------------------------
    def poll(self, limit: int) -> list[dict[str, Any]]:
        rows: list[dict[str, Any]] = []
        lines = 0
        while lines < limit:
            chunk = self._read()
            if chunk:
                data = self._partial + chunk
                parts = data.split(b"\n")
                self._partial = parts.pop()
                for raw in parts:
                    start = self._offset
                    self._offset += len(raw) + 1
                    rows.extend(self._line(raw, start))
                    lines += 1
                continue
            if not self._switch_if_rotated(rows):
                # With --once a last line still without its newline is left for the next
                # run: the logger may be in the middle of writing it.
                self.done = self.once
                break
        return rows

    def _read(self) -> bytes:
        if self._handle is None and not self._open(self.path):
            if not self._waiting_logged:
                log.info("waiting for %s to appear", self.path)
                self._waiting_logged = True
            return b""
        chunk = self._handle.read(64 * 1024)
        if chunk and len(self._head) < self.HEAD:
            self._head += chunk[: self.HEAD - len(self._head)]
        return chunk

    def _line(self, raw: bytes, start: int) -> list[dict[str, Any]]:
        name = os.path.basename(self._handle.name) if self._handle else self.path
        where = f"{name} at byte {start}"
        try:
            text = raw.rstrip(b"\r").decode(self._encoding)
        except UnicodeDecodeError as exc:
            self._mapper.reject(
                where=where,
                error=f"not {self._encoding}: {exc}",
                line=raw.decode("utf-8", "replace"),
            )
            return []
        return self.rows_of(text.lstrip("\ufeff"), where)

    def _switch_if_rotated(self, rows: list[dict[str, Any]]) -> bool:
        """At the end of the open file: move on if the log was rotated or truncated. True when
        there is a new place to read from."""
        if self._handle is None:
            return False
        if self._draining:
            self._finish_partial(rows)
            self._draining = False
            self._handle.close()
            self._handle = None
            log.info("rotated file finished; following %s", self.path)
            return self._open(self.path)
        try:
            stat = os.stat(self.path)
        except FileNotFoundError:
            return False  # renamed away, the new file not created yet: keep waiting
        if (stat.st_dev, stat.st_ino) != self._ident:
            # Renamed away: lines may have reached the old file between our last read and the
            # rename, so it is read to its end once more before the new file is opened.
            log.info(
                "%s was rotated; finishing the old file, then following the new one", self.path
            )
            self._draining = True
            return True
        if stat.st_size < self._offset + len(self._partial):
            log.warning("%s was truncated; reading it again from the start", self.path)
            self._open(self.path)
            return True
        return False

    def _finish_partial(self, rows: list[dict[str, Any]]) -> None:
        if self._partial:
            # The rotated file's last line without its newline: the writer has moved on to
            # the new file, so the line is complete.
            start = self._offset
            self._offset += len(self._partial)
            rows.extend(self._line(self._partial, start))
            self._partial = b""

    def position(self) -> dict[str, Any] | None:
        # While a rotated file is being finished the position is on that file: a restarted
        # client finds it again by its identity and fingerprint.
        if self._ident is None:
            return None
        head = self._head[: min(self._offset, self.HEAD)]
        return {
            "path": self.path,
            "ident": list(self._ident),
            "offset": self._offset,
            "head_length": len(head),
            "head_sha256": hashlib.sha256(head).hexdigest(),
            "header": self._mapper.header,
        }


class StdinLines(LineSource):
    """Lines on standard input, read by a thread so that batches are flushed on time while
    the producer is quiet."""

    label = "stdin"

    def __init__(self, mapper: RowMapper, *, delimiter: str, encoding: str):
        super().__init__(mapper, delimiter)
        self._queue: queue.Queue = queue.Queue(maxsize=100_000)
        self._encoding = encoding
        self._line_number = 0
        self.done = False
        threading.Thread(target=self._pump, name="stdin", daemon=True).start()

    def _pump(self) -> None:
        stream = sys.stdin.buffer
        for raw in iter(stream.readline, b""):
            self._queue.put(raw)
        self._queue.put(None)

    def poll(self, limit: int) -> list[dict[str, Any]]:
        rows: list[dict[str, Any]] = []
        for _ in range(limit):
            try:
                raw = self._queue.get_nowait()
            except queue.Empty:
                break
            if raw is None:
                self.done = True
                break
            self._line_number += 1
            where = f"stdin line {self._line_number}"
            try:
                text = raw.decode(self._encoding).rstrip("\r\n").lstrip("\ufeff")
            except UnicodeDecodeError as exc:
                self._mapper.reject(
                    where=where,
                    error=f"not {self._encoding}: {exc}",
                    line=raw.decode("utf-8", "replace"),
                )
                continue
            rows.extend(self.rows_of(text, where))
        return rows

    def position(self) -> dict[str, Any] | None:
        return None


# --- the server -------------------------------------------------------------------------------


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    """urllib would repeat a redirected POST as a GET, losing the body; say so instead."""

    def redirect_request(self, req, fp, code, msg, headers, newurl):
        return None


@dataclass
class Answer:
    status: int
    body: Any
    retry_after: float | None

    @property
    def detail(self) -> str:
        if isinstance(self.body, dict) and isinstance(self.body.get("detail"), str):
            return self.body["detail"]
        return ""


def retry_after_seconds(value: str | None) -> float | None:
    if not value:
        return None
    value = value.strip()
    if value.isdigit():
        return float(value)
    try:
        when = parsedate_to_datetime(value)
    except (TypeError, ValueError, IndexError):
        return None
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    return max(0.0, (when - datetime.now(UTC)).total_seconds())


def describe_failure(exc: BaseException, timeout: float) -> str:
    reason = exc.reason if isinstance(exc, urllib.error.URLError) else exc
    if isinstance(reason, ssl.SSLCertVerificationError):
        return f"TLS certificate not verified ({reason.verify_message}); give the CA with --ca-file"
    if isinstance(reason, ConnectionRefusedError):
        return "connection refused (the server is down or not listening)"
    if isinstance(reason, TimeoutError) or "timed out" in str(reason):
        return f"no answer within {timeout:g} s"
    return str(reason) or type(reason).__name__


class Sender:
    def __init__(self, url: str, token: str, *, timeout: float, ca_file: str | None):
        self.url = url
        self.timeout = timeout
        self._token = token
        try:
            context = ssl.create_default_context(cafile=ca_file)
        except (OSError, ssl.SSLError) as exc:
            raise Stop(f"--ca-file {ca_file}: {exc}") from None
        self._opener = urllib.request.build_opener(
            urllib.request.HTTPSHandler(context=context), _NoRedirect()
        )

    def post(self, rows: list[dict[str, Any]]) -> Answer:
        body = json.dumps(rows, separators=(",", ":"), allow_nan=False).encode("utf-8")
        request = urllib.request.Request(  # noqa: S310 - the scheme is checked to be http(s)
            self.url,
            data=body,
            method="POST",
            headers={
                "Content-Type": "application/json",
                "Accept": "application/json",
                "Authorization": f"Bearer {self._token}",
                "User-Agent": USER_AGENT,
            },
        )
        try:
            try:
                with self._opener.open(request, timeout=self.timeout) as response:
                    status, raw, headers = response.status, response.read(), response.headers
            except urllib.error.HTTPError as exc:
                status, headers = exc.code, exc.headers
                try:
                    raw = exc.read()
                finally:
                    exc.close()
        except (OSError, http.client.HTTPException) as exc:
            raise Unreachable(describe_failure(exc, self.timeout)) from None
        try:
            parsed = json.loads(raw.decode("utf-8")) if raw else None
        except ValueError:
            parsed = None
        answer = Answer(status, parsed, retry_after_seconds(headers.get("Retry-After")))
        if 300 <= status < 400:
            raise Stop(
                f"the server redirects {self.url} ({status}) to {headers.get('Location')}: "
                "give that address as --url"
            )
        return answer


def host_of(url: str) -> str:
    """The URL without any user:password part, for messages."""
    parts = urllib.parse.urlsplit(url)
    port = f":{parts.port}" if parts.port else ""
    return f"{parts.scheme}://{parts.hostname}{port}{parts.path}"


@dataclass
class Stats:
    read: int = 0
    spooled: int = 0
    sent: int = 0
    inserted: int = 0
    duplicates: int = 0
    rejected_by_server: int = 0


class Delivery:
    """Sends the spool's entries in order, one at a time, and records each outcome."""

    def __init__(
        self,
        spool: Spool,
        state: StateFile,
        sender: Sender,
        rejects: RejectLog,
        stats: Stats,
        *,
        max_backoff: float,
        once: bool,
    ):
        self.spool = spool
        self.state = state
        self.sender = sender
        self.rejects = rejects
        self.stats = stats
        self.max_backoff = max_backoff
        self.once = once
        self.failures = 0
        self.next_attempt = 0.0
        self.gave_up = False  # --once (or the last pass before exiting) met a failure

    def ready(self, now: float, *, final: bool = False) -> bool:
        if not self.spool.pending_batches or self.gave_up:
            return False
        return final or now >= self.next_attempt

    def deliver_one(self, *, final: bool = False) -> bool:
        head = self.spool.head()
        if head is None:
            return False
        seq, rows = head
        try:
            self._send(rows, seq, 0)
        except Unreachable as exc:
            self._failed(exc, final=final)
            return False
        # Rejections are on disk before the entry is marked delivered: a crash in between
        # sends the batch again, never loses the reasons.
        self.rejects.sync()
        self.state.data["delivered_seq"] = seq
        self.state.save()
        self.spool.delivered(seq)
        if self.failures:
            log.info(
                "the server answers again; %d spooled batch(es) to send", self.spool.pending_batches
            )
        self.failures = 0
        self.spool.compact_if_worth_it()
        return True

    def _send(self, rows: list[dict[str, Any]], seq: int, base: int) -> None:
        answer = self.sender.post(rows)
        status = answer.status
        if 200 <= status < 300:
            self._accepted(answer, rows, seq, base)
            return
        if status == 413 and len(rows) > 1:
            # Too large for the server or a proxy in front of it: send it in halves, in order.
            middle = len(rows) // 2
            log.info(
                "batch %d: %d readings are too many for the server; sending halves", seq, len(rows)
            )
            self._send(rows[:middle], seq, base)
            self._send(rows[middle:], seq, base + middle)
            return
        if status == 401:
            raise Stop(
                f"the server refused the token (401 {answer.detail or 'Unauthorized'}): it is "
                "unknown, revoked or expired. Mint a new one on the server with "
                "`python manage.py mint_token USER --instrument NAME`. "
                f"{self.spool.pending_rows} readings stay in the spool."
            )
        if status == 403:
            raise Stop(
                f"the server does not let this token write readings (403 "
                f"{answer.detail or 'Forbidden'}): a read-only token, or an account that is "
                "not a lab member. Mint a writing token with "
                "`python manage.py mint_token USER --instrument NAME`. "
                f"{self.spool.pending_rows} readings stay in the spool."
            )
        if status in (404, 405):
            raise Stop(
                f"{host_of(self.sender.url)} answered {status}: no readings endpoint there; "
                "--url must end in /api/v1/readings"
            )
        if status in (408, 429) or status >= 500:
            raise Unreachable(
                f"the server answered {status}{': ' + answer.detail if answer.detail else ''}",
                answer.retry_after,
            )
        if 400 <= status < 500:
            # The server refused the whole batch; sending it again gets the same answer.
            reason = f"{status}: {answer.detail or 'the server refused the batch'}"
            for index, row in enumerate(rows):
                self.rejects.write(
                    stage="server", where=f"batch {seq} row {base + index}", error=reason, row=row
                )
            self.stats.rejected_by_server += len(rows)
            log.error("batch %d (%d readings) refused whole: %s", seq, len(rows), reason)
            return
        raise Unreachable(f"the server answered {status}")

    def _accepted(self, answer: Answer, rows: list[dict[str, Any]], seq: int, base: int) -> None:
        result = answer.body
        if not (
            isinstance(result, dict)
            and isinstance(result.get("accepted"), int)
            and isinstance(result.get("rejected"), list)
        ):
            # Something else answered (a login page, a proxy's portal): the batch is not
            # known to be stored, so it stays in the spool.
            raise Stop(
                f"{host_of(self.sender.url)} answered {answer.status} without a readings "
                "result: is --url the labbook server's /api/v1/readings?"
            )
        rejected = result["rejected"]
        if result["accepted"] + len(rejected) != len(rows):
            log.warning(
                "batch %d: %d readings sent but the server counts %d accepted and %d rejected",
                seq,
                len(rows),
                result["accepted"],
                len(rejected),
            )
        for item in rejected:
            index = item.get("index") if isinstance(item, dict) else None
            row = rows[index] if isinstance(index, int) and 0 <= index < len(rows) else None
            position = base + index if isinstance(index, int) else "?"
            error = item.get("error", "rejected") if isinstance(item, dict) else str(item)
            self.rejects.write(
                stage="server", where=f"batch {seq} row {position}", error=str(error), row=row
            )
        self.stats.sent += len(rows)
        self.stats.inserted += int(result.get("inserted", 0) or 0)
        self.stats.duplicates += int(result.get("duplicates", 0) or 0)
        self.stats.rejected_by_server += len(rejected)
        log.debug(
            "batch %d: %d readings, %s new, %s already stored, %d rejected",
            seq,
            len(rows),
            result.get("inserted"),
            result.get("duplicates"),
            len(rejected),
        )

    def _failed(self, exc: Unreachable, *, final: bool) -> None:
        self.failures += 1
        pending = f"{self.spool.pending_batches} batch(es), {self.spool.pending_rows} readings"
        if self.once or final:
            self.gave_up = True
            log.warning("cannot deliver: %s; %s stay in the spool for the next run", exc, pending)
            return
        if exc.retry_after is not None:
            delay = min(exc.retry_after, self.max_backoff)
        else:
            # Capped exponential backoff with jitter, so that the loggers of a lab do not all
            # come back at the same second after an outage.
            delay = min(self.max_backoff, 2.0 ** min(self.failures - 1, 20))
            delay *= random.uniform(0.8, 1.0)
        self.next_attempt = time.monotonic() + delay
        log.warning(
            "cannot deliver: %s; %s kept in the spool, next try in %.0f s", exc, pending, delay
        )


# --- the loop ---------------------------------------------------------------------------------


class Runner:
    def __init__(
        self,
        *,
        source,
        spool: Spool,
        state: StateFile,
        delivery: Delivery,
        rejects: RejectLog,
        stats: Stats,
        batch: int,
        flush_seconds: float,
        poll_seconds: float,
        once: bool,
        max_seconds: float | None,
    ):
        self.source = source
        self.spool = spool
        self.state = state
        self.delivery = delivery
        self.rejects = rejects
        self.stats = stats
        self.batch = batch
        self.flush_seconds = flush_seconds
        self.poll_seconds = poll_seconds
        self.once = once
        self.max_seconds = max_seconds
        self.stop_requested = False
        self._buffer: list[dict[str, Any]] = []
        self._buffer_since: float | None = None
        self._saved_position: Any = None

    def request_stop(self, *_: Any) -> None:
        self.stop_requested = True

    def run(self) -> None:
        started = time.monotonic()
        try:
            self._loop(started)
        finally:
            # Whatever has been read is spooled before the process ends, even on a Stop.
            self._flush()
            self.rejects.sync()

    def _loop(self, started: float) -> None:
        source = self.source
        while True:
            now = time.monotonic()
            stopping = self.stop_requested or (
                self.max_seconds is not None and now - started >= self.max_seconds
            )
            progressed = False
            if source is not None and not source.done and not stopping:
                rows = source.poll(max(1, self.batch - len(self._buffer)))
                if rows:
                    progressed = True
                    self.stats.read += len(rows)
                    if self._buffer_since is None:
                        self._buffer_since = now
                    self._buffer.extend(rows)
            finished = source is None or source.done
            due = self._buffer_since is not None and now - self._buffer_since >= self.flush_seconds
            flush_now = len(self._buffer) >= self.batch or due or finished or stopping
            if flush_now and self._flush():
                progressed = True
            final = stopping or (finished and self.once)
            if self.delivery.ready(time.monotonic(), final=final):
                progressed = self.delivery.deliver_one(final=final) or progressed
            if (
                (stopping or finished)
                and not self._buffer
                and (not self.spool.pending_batches or self.delivery.gave_up)
            ):
                return
            if not progressed:
                time.sleep(self._idle(now))

    def _idle(self, now: float) -> float:
        waits = [self.poll_seconds]
        if self._buffer_since is not None:
            waits.append(self._buffer_since + self.flush_seconds - now)
        if self.spool.pending_batches and not self.delivery.gave_up:
            waits.append(self.delivery.next_attempt - now)
        return min(max(0.01, wait) for wait in waits)

    def _flush(self) -> bool:
        """Spool what has been read, then save the source's position: the position never runs
        ahead of what is safely on disk."""
        wrote = False
        label = self.source.label if self.source is not None else "spool"
        while self._buffer:
            chunk, self._buffer = self._buffer[: self.batch], self._buffer[self.batch :]
            seq = self.spool.append(chunk, label)
            self.stats.spooled += len(chunk)
            log.debug("spooled batch %d (%d readings)", seq, len(chunk))
            wrote = True
        self._buffer_since = None
        self.rejects.sync()
        position = self.source.position() if self.source is not None else None
        if position is not None and position != self._saved_position:
            self.state.data["follow"] = position
            self.state.save()
            self._saved_position = position
        return wrote


# --- command line -----------------------------------------------------------------------------


def read_token(token_file: str | None) -> str:
    if token_file:
        try:
            mode = os.stat(token_file).st_mode
            with open(token_file, encoding="utf-8") as handle:
                lines = [line.strip() for line in handle.read().splitlines() if line.strip()]
        except OSError as exc:
            raise Stop(f"cannot read the token file {token_file}: {exc.strerror or exc}") from None
        if os.name == "posix" and mode & 0o077:
            log.warning(
                "the token file %s can be read by other users (mode %03o): chmod 600 %s",
                token_file,
                mode & 0o777,
                token_file,
            )
        if not lines:
            raise Stop(f"the token file {token_file} is empty")
        if len(lines) > 1:
            log.warning(
                "the token file %s has %d lines; using the last one", token_file, len(lines)
            )
        token = lines[-1]
    else:
        token = os.environ.get("LABBOOK_TOKEN", "").strip()
        if not token:
            raise Stop(
                "no token: give --token-file FILE or set LABBOOK_TOKEN (mint one on the server "
                "with `python manage.py mint_token USER --instrument NAME`)"
            )
    if not re.fullmatch(r"[\x21-\x7e]+", token):
        raise Stop("the token holds spaces or non-ASCII characters; copy it again")
    return token


def check_url(url: str) -> str:
    parts = urllib.parse.urlsplit(url)
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise Stop(f"--url {url!r} must be http(s)://HOST/api/v1/readings")
    loopback = parts.hostname in ("localhost", "::1") or parts.hostname.startswith("127.")
    if parts.scheme == "http" and not loopback:
        log.warning(
            "--url is plain http: the token and the readings cross the network "
            "unencrypted; use https"
        )
    return url


def parse_delimiter(text: str) -> str:
    named = {"tab": "\t", "\\t": "\t", "comma": ",", "semicolon": ";", "space": " "}
    delimiter = named.get(text.lower(), text)
    if len(delimiter) != 1:
        raise Stop(f"--delimiter {text!r} must be one character (or tab, semicolon)")
    return delimiter


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="logger.py",
        description="Send readings from a chamber PC to labbook (POST /api/v1/readings). "
        "Batches are spooled to disk first and sent in order; an unreachable server costs "
        "a delay, never a reading.",
        epilog="Exit status: 0 all delivered, 1 readings left in the spool, 2 stopped "
        "(configuration, token refused), 3 some rows rejected (see the rejected log).",
    )
    server = parser.add_argument_group("server")
    server.add_argument(
        "--url",
        default=os.environ.get("LABBOOK_URL"),
        help="https://HOST/api/v1/readings (or env LABBOOK_URL)",
    )
    server.add_argument(
        "--token-file",
        help="file holding the token (else env LABBOOK_TOKEN); keep it readable only by its owner",
    )
    server.add_argument(
        "--ca-file",
        help="CA certificate(s) to verify the server with, for a lab CA; verification is always on",
    )
    server.add_argument("--timeout", type=float, default=30.0, help="seconds (default 30)")

    sources = parser.add_argument_group("source (one, or none to replay the spool only)")
    exclusive = sources.add_mutually_exclusive_group()
    exclusive.add_argument("--csv", metavar="FILE", help="a CSV export, read once")
    exclusive.add_argument(
        "--follow", metavar="FILE", help="a log followed like tail -F, across rotation and restarts"
    )
    exclusive.add_argument(
        "--stdin", action="store_true", help="lines on standard input: JSON objects or CSV lines"
    )

    layout = parser.add_argument_group("columns and times")
    layout.add_argument(
        "--map",
        action="append",
        default=[],
        metavar="COLUMN=ID[:UNIT]",
        help="column (or channel name) -> channel id, with a unit for bare "
        "numbers, e.g. --map 'Prep gauge (mbar)=12:mbar'; repeat per column",
    )
    layout.add_argument("--columns", help="the header when the data has none, comma-separated")
    layout.add_argument(
        "--time-column", help="the time column's name (default t, time, or the first column)"
    )
    layout.add_argument(
        "--time-format",
        default="iso",
        help="iso (default), epoch, epoch-ms, or a strftime pattern such as "
        "'%%d.%%m.%%Y %%H:%%M:%%S'",
    )
    layout.add_argument("--time-zone", help="zone of naive times, e.g. Europe/Berlin (Python 3.9+)")
    layout.add_argument("--utc-offset", help="fixed offset of naive times, e.g. +01:00")
    layout.add_argument("--delimiter", default=",", help="CSV delimiter (default ,; tab, ;)")
    layout.add_argument("--decimal-comma", action="store_true", help="numbers written 2,5E-10")
    layout.add_argument(
        "--encoding", default="utf-8-sig", help="text encoding (default utf-8, with or without BOM)"
    )
    layout.add_argument(
        "--skip-lines", type=int, default=0, help="lines before the CSV header to skip"
    )

    sending = parser.add_argument_group("sending")
    sending.add_argument(
        "--batch",
        type=int,
        default=1000,
        help=f"readings a request (default 1000, at most {SERVER_MAX_BATCH})",
    )
    sending.add_argument(
        "--flush-seconds",
        type=float,
        default=5.0,
        help="send a partial batch after this long (default 5)",
    )
    sending.add_argument(
        "--max-backoff",
        type=float,
        default=300.0,
        help="longest wait between tries while the server is away (default "
        "300 s; Retry-After is obeyed up to this)",
    )

    running = parser.add_argument_group("running")
    running.add_argument(
        "--state-dir",
        default=os.path.join("~", ".labbook-logger"),
        help="spool, state, rejected log and lock (default ~/.labbook-logger)",
    )
    running.add_argument("--rejected-log", help="default STATE_DIR/rejected.jsonl")
    running.add_argument(
        "--once",
        action="store_true",
        help="read what is there, send it and the spool, exit (for cron)",
    )
    running.add_argument("--max-seconds", type=float, help="stop after this long")
    running.add_argument(
        "--poll-seconds",
        type=float,
        default=0.5,
        help="how often a followed log is checked (default 0.5)",
    )
    running.add_argument(
        "--start-at-end",
        action="store_true",
        help="--follow: on the first run skip what the log already holds",
    )
    running.add_argument("--verbose", "-v", action="store_true", help="log every batch")
    return parser


def build_source(args, mapper: RowMapper, state: StateFile):
    delimiter = parse_delimiter(args.delimiter)
    columns = [name.strip() for name in args.columns.split(",")] if args.columns else None
    if args.csv:
        return CsvExport(
            args.csv,
            mapper,
            encoding=args.encoding,
            delimiter=delimiter,
            skip_lines=args.skip_lines,
            columns=columns,
        )
    if columns:
        mapper.set_header(columns, strict=True)
    if args.follow:
        return LogFollower(
            args.follow,
            mapper,
            delimiter=delimiter,
            encoding=args.encoding,
            saved=state.data.get("follow"),
            start_at_end=args.start_at_end,
            once=args.once,
        )
    if args.stdin:
        return StdinLines(mapper, delimiter=delimiter, encoding=args.encoding)
    return None


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.verbose else logging.INFO,
        format="%(asctime)s %(name)s %(levelname)s %(message)s",
        stream=sys.stderr,
    )
    stats = Stats()
    lock = None
    rejects = None
    spool = None
    status = EXIT_STOPPED
    try:
        if not args.url:
            raise Stop("give --url https://HOST/api/v1/readings (or set LABBOOK_URL)")
        if not 1 <= args.batch <= SERVER_MAX_BATCH:
            raise Stop(f"--batch must be between 1 and {SERVER_MAX_BATCH}")
        url = check_url(args.url)
        token = read_token(args.token_file)
        state_dir = os.path.abspath(os.path.expanduser(args.state_dir))
        os.makedirs(state_dir, mode=0o700, exist_ok=True)
        lock = DirectoryLock(state_dir)
        lock.acquire()
        state = StateFile(os.path.join(state_dir, "state.json"))
        spool = Spool(os.path.join(state_dir, "spool.jsonl"), state.delivered_seq)
        rejects = RejectLog(args.rejected_log or os.path.join(state_dir, "rejected.jsonl"))
        local_rejects = 0

        def reject(*, where: str, error: str, line: str | None = None) -> None:
            nonlocal local_rejects
            local_rejects += 1
            rejects.write(stage="client", where=where, error=error, line=line)

        times = TimeReader(args.time_format, zone_from_args(args.time_zone, args.utc_offset))
        mapper = RowMapper(
            parse_map(args.map),
            times,
            time_column=args.time_column,
            decimal_comma=args.decimal_comma,
            reject=reject,
        )
        source = build_source(args, mapper, state)
        sender = Sender(url, token, timeout=args.timeout, ca_file=args.ca_file)
        delivery = Delivery(
            spool, state, sender, rejects, stats, max_backoff=args.max_backoff, once=args.once
        )
        runner = Runner(
            source=source,
            spool=spool,
            state=state,
            delivery=delivery,
            rejects=rejects,
            stats=stats,
            batch=args.batch,
            flush_seconds=args.flush_seconds,
            poll_seconds=args.poll_seconds,
            once=args.once,
            max_seconds=args.max_seconds,
        )
        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGTERM, runner.request_stop)
            signal.signal(signal.SIGINT, runner.request_stop)
        log.info(
            "%s -> %s (%d spooled batch(es) to send first)",
            source.label if source else "spool only",
            host_of(url),
            spool.pending_batches,
        )
        runner.run()
        if spool.pending_batches:
            status = EXIT_PENDING
        elif local_rejects or stats.rejected_by_server:
            status = EXIT_REJECTED
        else:
            status = EXIT_OK
    except Stop as exc:
        log.error("stopped: %s", exc)
        status = EXIT_STOPPED
    except OSError as exc:
        # A full disk or a lost state directory: stop loudly rather than read on and lose.
        log.error("stopped: %s", exc)
        status = EXIT_STOPPED
    finally:
        if spool is not None:
            try:
                spool.compact_if_worth_it()
            except OSError as exc:
                log.warning("spool not compacted: %s", exc)
        if rejects is not None:
            rejects.close()
        if lock is not None:
            lock.release()
    pending = spool.pending_rows if spool is not None else 0
    rejected = rejects.count if rejects is not None else 0
    summary = {
        "status": status,
        "read": stats.read,
        "sent": stats.sent,
        "inserted": stats.inserted,
        "duplicates": stats.duplicates,
        "rejected": rejected,
        "pending_batches": spool.pending_batches if spool is not None else 0,
        "pending_readings": pending,
    }
    log.info(
        "done: %d read, %d sent (%d new, %d already stored), %d rejected, %d still spooled",
        stats.read,
        stats.sent,
        stats.inserted,
        stats.duplicates,
        rejected,
        pending,
    )
    # One JSON line on stdout for scripts (cron, tests); everything else goes to stderr.
    print(json.dumps(summary), flush=True)
    return status


if __name__ == "__main__":
    sys.exit(main())
