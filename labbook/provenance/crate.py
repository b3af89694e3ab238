"""Datasets with their provenance as an RO-Crate 1.1 (https://w3id.org/ro/crate/1.1), written
with the ``rocrate`` library and streamed as a ZIP.

The crate holds, per dataset, the bytes as the instrument wrote them, its preview when there is
one and its provenance as JSON; and one W3C PROV-JSON document for all of them. Every file
carries its SHA-256 and size. The provenance also appears as contextual entities, in the terms
RO-Crate 1.1 gives for it ("Provenance of entities"): the acquisition is a ``CreateAction``
with the operator as ``agent``, the instrument and the tip as ``instrument``, the sample as
``object`` and the dataset as ``result``; each preparation and conditioning is an
``UpdateAction`` on the sample or the tip; labbook's processing is a ``CreateAction`` whose
``instrument`` is labbook as a ``SoftwareApplication`` with its version.

Memory stays bounded whatever the crate's size: the ZIP is streamed in chunks by ``rocrate``
from the stored files; where the storage has no local path the bytes are copied, one file at
a time, into a temporary directory under the data directory, removed when the stream ends.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import tempfile
import unicodedata
from collections.abc import Callable, Iterator
from pathlib import Path, PurePosixPath
from typing import Any

from django.conf import settings
from django.core.files.storage import default_storage
from rocrate.rocrate import ROCrate

import labbook
from labbook.provenance import prov
from labbook.provenance.queries import Provenance, as_json

CHUNK = 1 << 16
PROV_JSON_SPEC = "https://www.w3.org/Submission/2013/SUBM-prov-json-20130424/"
#: Datasets in one crate at most: a figure or a paper, not the lab's archive.
MAX_DATASETS = 500
#: The RO-Crate specification the crates follow (rocrate writes 1.3 unless told).
RO_CRATE_VERSION = "1.1"


def _local_path(storage_name: str, scratch: Path) -> str:
    """A path on disk holding the stored bytes: the storage's own where it has one (a
    backend may name a path that holds nothing: Django's in-memory storage does)."""
    try:
        own = default_storage.path(storage_name)
    except NotImplementedError:
        own = None
    if own is not None and os.path.isfile(own):
        return own
    target = scratch / hashlib.sha256(storage_name.encode()).hexdigest()
    with default_storage.open(storage_name, "rb") as source, open(target, "wb") as out:
        shutil.copyfileobj(source, out, CHUNK)
    return str(target)


def _text_file(
    crate: ROCrate, scratch: Path, dest: str, text: str, properties: dict[str, Any]
) -> Any:
    """A file written by labbook (JSON), kept in the scratch directory rather than in memory
    until the ZIP is streamed: a crate of hundreds of datasets holds hundreds of them."""
    body = text.encode()
    path = scratch / hashlib.sha256(dest.encode()).hexdigest()
    path.write_bytes(body)
    return crate.add_file(
        source=str(path),
        dest_path=dest,
        properties={
            **properties,
            "contentSize": str(len(body)),
            "sha256": hashlib.sha256(body).hexdigest(),
        },
    )


def _ref(identifier: str) -> dict[str, str]:
    return {"@id": identifier}


def _safe_name(name: str) -> str:
    cleaned = "".join(ch if ch.isalnum() or ch in "._-" else "_" for ch in name)
    return cleaned.strip("._") or "data"


class _Entities:
    """Contextual entities, each added once however many datasets name it."""

    def __init__(self, crate: ROCrate):
        self.crate = crate
        self.ids: set[str] = set()

    def add(self, jsonld: dict[str, Any]) -> dict[str, str]:
        if jsonld["@id"] not in self.ids:
            self.ids.add(jsonld["@id"])
            self.crate.add_jsonld({k: v for k, v in jsonld.items() if v not in (None, "", [])})
        return _ref(jsonld["@id"])

    def person(self, user) -> dict[str, str] | None:
        if user is None:
            return None
        return self.add(
            {
                "@id": f"#person-{user.pk}",
                "@type": "Person",
                "name": user.get_full_name() or user.get_username(),
                "affiliation": self.lab(),
            }
        )

    def lab(self) -> dict[str, str]:
        return self.add(
            {
                "@id": "#lab",
                "@type": "Organization",
                "name": getattr(settings, "LABBOOK_LAB_NAME", "")
                or "the lab that keeps this labbook",
                "url": getattr(settings, "LABBOOK_LAB_URL", ""),
            }
        )

    def instrument(self, instrument) -> dict[str, str]:
        return self.add(
            {
                "@id": f"#instrument-{instrument.pk}",
                "@type": "IndividualProduct",
                "name": instrument.name,
                "description": instrument.description,
            }
        )

    def software(self) -> dict[str, str]:
        return self.add(
            {
                "@id": f"#labbook-{labbook.__version__}",
                "@type": "SoftwareApplication",
                "name": "labbook",
                "version": labbook.__version__,
            }
        )


def _add_dataset(crate: ROCrate, entities: _Entities, found: Provenance, scratch: Path) -> None:
    record = found.file
    folder = f"datasets/{record.pk}"
    data = crate.add_file(
        source=_local_path(record.storage_name, scratch),
        dest_path=f"{folder}/{_safe_name(record.original_name)}",
        properties={
            "name": record.original_name,
            "encodingFormat": "application/octet-stream",
            "contentSize": str(record.size_bytes),
            "sha256": record.sha256,
            "dateCreated": None if record.acquired_at is None else record.acquired_at.isoformat(),
            "description": f"{record.get_kind_display()} as the instrument wrote it",
        },
    )
    described = _text_file(
        crate,
        scratch,
        f"{folder}/provenance.json",
        json.dumps(as_json(found), indent=1, sort_keys=True, default=str),
        {
            "name": f"provenance of {record.original_name}",
            "encodingFormat": "application/json",
            "about": _ref(data.id),
        },
    )
    sample = tip = None
    if found.sample is not None:
        surface = found.surface
        sample = entities.add(
            {
                "@id": f"#sample-{found.sample.pk}",
                "@type": "Thing",
                "name": found.sample.name,
                "description": found.sample.substrate,
                "identifier": found.sample.identifier,
            }
        )
        for preparation in found.preparations:
            steps = "; ".join(
                f"{s.position + 1}. {s.kind}{' (cleans)' if s.cleans else ''}"
                for s in preparation.steps.all()
            )
            entities.add(
                {
                    "@id": f"#preparation-{preparation.pk}",
                    "@type": "UpdateAction",
                    "name": f"preparation of {found.sample}"
                    + (f" by {preparation.recipe}" if preparation.recipe else ""),
                    "description": steps,
                    "startTime": preparation.started_at.isoformat(),
                    "endTime": None
                    if preparation.ended_at is None
                    else preparation.ended_at.isoformat(),
                    "agent": entities.person(preparation.operator),
                    "instrument": entities.instrument(preparation.instrument),
                    "object": sample,
                }
            )
        if surface is not None and surface.coverages:
            coverage = ", ".join(f"{c.material} {c.coverage_ml:.3g} ML" for c in surface.coverages)
            data["description"] = f"{data['description']}; surface then: {coverage}"
    if found.tip is not None:
        tip = entities.add(
            {
                "@id": f"#tip-{found.tip.pk}",
                "@type": "IndividualProduct",
                "name": found.tip.name,
                "description": f"{found.tip.material} tip ({found.tip.origin})",
            }
        )
        for event in [] if found.tip_state is None else found.tip_state.events:
            entities.add(
                {
                    "@id": f"#conditioning-{event.pk}",
                    "@type": "UpdateAction",
                    "name": event.get_kind_display(),
                    "description": event.outcome,
                    "startTime": event.at.isoformat(),
                    "endTime": event.at.isoformat(),
                    "agent": entities.person(event.performed_by),
                    "object": tip,
                }
            )
    instruments = [
        x
        for x in (
            None if record.instrument is None else entities.instrument(record.instrument),
            tip,
        )
        if x
    ]
    entities.add(
        {
            "@id": f"#acquisition-{record.pk}",
            "@type": "CreateAction",
            "name": f"acquisition of {record.original_name}",
            "startTime": None if record.acquired_at is None else record.acquired_at.isoformat(),
            "endTime": None if record.acquired_at is None else record.acquired_at.isoformat(),
            "agent": entities.person(found.operator),
            "instrument": instruments,
            "object": sample,
            "result": _ref(data.id),
        }
    )
    if record.processed_at is not None:
        results = [_ref(described.id)]
        if record.thumbnail_name and default_storage.exists(record.thumbnail_name):
            preview = crate.add_file(
                source=_local_path(record.thumbnail_name, scratch),
                dest_path=f"{folder}/preview.png",
                properties={
                    "name": f"preview of {record.original_name}",
                    "encodingFormat": "image/png",
                    "contentSize": str(default_storage.size(record.thumbnail_name)),
                    "sha256": _stored_sha256(record.thumbnail_name),
                    "about": _ref(data.id),
                },
            )
            results.append(_ref(preview.id))
        entities.add(
            {
                "@id": f"#processing-{record.pk}",
                "@type": "CreateAction",
                "name": f"reading and measuring {record.original_name}",
                "description": f"reader {record.reader}" if record.reader else None,
                "endTime": record.processed_at.isoformat(),
                "instrument": entities.software(),
                "object": _ref(data.id),
                "result": results,
            }
        )


def _stored_sha256(storage_name: str) -> str:
    digest = hashlib.sha256()
    with default_storage.open(storage_name, "rb") as handle:
        while chunk := handle.read(CHUNK):
            digest.update(chunk)
    return digest.hexdigest()


def build_crate(
    found: list[Provenance], scratch: Path, *, name: str = "", description: str = ""
) -> ROCrate:
    """The crate of ``found`` (its files are read from storage when it is written)."""
    if not found:
        raise ValueError("a crate needs at least one dataset")
    if len(found) > MAX_DATASETS:
        raise ValueError(f"at most {MAX_DATASETS} datasets go into one crate")
    crate = ROCrate(version=RO_CRATE_VERSION)
    names = ", ".join(p.file.original_name for p in found[:5]) + (", …" if len(found) > 5 else "")
    crate.name = name or (
        f"{found[0].file.original_name} with its provenance"
        if len(found) == 1
        else f"{len(found)} datasets with their provenance ({names})"
    )
    crate.description = description or (
        "Datasets as the instrument wrote them, their SHA-256 checksums, and how each was made:"
        " the sample's preparations since its last cleaning, the tip's conditioning since it was"
        " mounted, the instrument's state at acquisition, who took them and what was computed."
    )
    entities = _Entities(crate)
    # RO-Crate 1.1 requires a licence on the root. A lab that publishes sets
    # LABBOOK_CRATE_LICENSE (a URL, e.g. of a Creative Commons licence); until then the crate
    # says, in words, that no licence was chosen, as the specification allows.
    license_url = getattr(settings, "LABBOOK_CRATE_LICENSE", "")
    crate.root_dataset["license"] = entities.add(
        {
            "@id": license_url,
            "@type": "CreativeWork",
            "name": license_url.rstrip("/").rsplit("/", 1)[-1] or license_url,
            "description": "the licence the lab chose for these data",
        }
        if license_url
        else {
            "@id": "#terms-of-use",
            "@type": "CreativeWork",
            "name": "no licence chosen",
            "description": "The lab has not chosen a licence for these data: ask it before"
            " reusing or publishing them.",
        }
    )
    for item in found:
        _add_dataset(crate, entities, item, scratch)
    authors = [entities.person(p.operator) for p in found if p.operator is not None]
    authors = list({a["@id"]: a for a in authors}.values())
    if authors:
        crate.root_dataset["author"] = authors[0] if len(authors) == 1 else authors
    crate.root_dataset["publisher"] = entities.lab()
    _text_file(
        crate,
        scratch,
        "provenance.prov.json",
        prov.prov_json(found),
        {
            "name": "W3C PROV document of the datasets",
            "encodingFormat": [prov.PROV_JSON_TYPE, _ref(PROV_JSON_SPEC)],
        },
    )
    entities.add(
        {
            "@id": PROV_JSON_SPEC,
            "@type": "WebSite",
            "name": "PROV-JSON (W3C Member Submission)",
        }
    )
    return crate


def scratch_dir() -> Path:
    """A fresh temporary directory under the data directory (never the system's /tmp, which
    may be a small RAM disk)."""
    base = Path(settings.DATA_DIR) / "tmp"
    base.mkdir(parents=True, exist_ok=True)
    return Path(tempfile.mkdtemp(prefix="crate-", dir=base))


#: ``progress(done, total)``: called as each dataset's entries are written into the ZIP.
Progress = Callable[[int, int], None]


def _report_datasets(crate: ROCrate, found: list[Provenance], progress: Progress) -> None:
    """Call ``progress`` once the last entry of each dataset has gone into the ZIP.

    The bytes are read while the ZIP is streamed, not while the crate is built, so that is
    where the time goes and where progress is counted. rocrate writes the data entities in the
    order they were added, and each dataset's entries sit under ``datasets/<id>/``."""
    last: dict[str, Any] = {}
    for entity in crate.data_entities:
        parts = str(entity.id).split("/")
        if len(parts) > 2 and parts[0] == "datasets":
            last[parts[1]] = entity
    order = [str(p.file.pk) for p in found]
    total = len(order)
    for done, key in enumerate(order, start=1):
        entity = last.get(key)
        if entity is None:  # pragma: no cover - every dataset adds its bytes
            continue
        # An instance attribute shadows the method for this crate's entity alone.
        entity.stream = _then(entity.stream, lambda done=done: progress(done, total))


def _then(stream: Callable[..., Iterator], after: Callable[[], None]) -> Callable[..., Iterator]:
    def wrapped(*args: Any, **kwargs: Any) -> Iterator:
        yield from stream(*args, **kwargs)
        after()

    return wrapped


def stream_crate(
    found: list[Provenance], *, progress: Progress | None = None, **labels: str
) -> Iterator[bytes]:
    """The crate as ZIP chunks; the scratch directory is removed when the stream ends or is
    abandoned. ``progress(done, total)``, if given, is called per dataset written."""
    scratch = scratch_dir()
    try:
        crate = build_crate(found, scratch, **labels)
        if progress is not None:
            _report_datasets(crate, found, progress)
    except BaseException:
        shutil.rmtree(scratch, ignore_errors=True)
        raise

    def chunks() -> Iterator[bytes]:
        try:
            yield from crate.stream_zip(chunk_size=CHUNK)
        finally:
            shutil.rmtree(scratch, ignore_errors=True)

    return chunks()


def write_crate_dir(found: list[Provenance], target: Path, **labels: str) -> Path:
    """The crate unpacked into ``target`` (for checking it, and for archives on disk)."""
    scratch = scratch_dir()
    try:
        build_crate(found, scratch, **labels).write(target)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return target


#: The longest stem a crate's title gives its download, before ``.crate.zip``.
TITLE_STEM_MAX = 80
# Names Windows refuses for a file whatever its extension ("CON.crate.zip" cannot be saved).
_RESERVED_STEMS = frozenset(
    {"CON", "PRN", "AUX", "NUL"} | {f"{port}{n}" for port in ("COM", "LPT") for n in range(1, 10)}
)


def title_stem(title: str) -> str:
    """The part of a crate's title that is safe as a file name on any system: ASCII letters,
    digits, '-', '_' and '.', other runs (spaces, slashes, quotes, markup, control characters)
    as one '-', accents dropped ("Ångström" → "Angstrom"), no leading or trailing dots or
    dashes, no "..", at most ``TITLE_STEM_MAX`` characters; "" when nothing usable is left."""
    # NFKD splits "Å" into "A" and a combining ring, which the ASCII encoding then drops.
    ascii_text = unicodedata.normalize("NFKD", title).encode("ascii", "ignore").decode()
    stem = re.sub(r"[^A-Za-z0-9._-]+", "-", ascii_text)
    stem = re.sub(r"\.{2,}", ".", stem)
    stem = re.sub(r"-{2,}", "-", stem).strip(".-_")
    stem = stem[:TITLE_STEM_MAX].rstrip(".-_")
    if stem.split(".", 1)[0].upper() in _RESERVED_STEMS:
        return ""
    return stem


def crate_filename(found: list[Provenance], title: str = "") -> str:
    """The name the crate downloads under: from its title when the title leaves a safe
    name, else from its one dataset's name, else from the number of datasets."""
    stem = title_stem(title or "")
    if stem:
        return f"{stem}.crate.zip"
    if len(found) == 1:
        stem = PurePosixPath(_safe_name(found[0].file.original_name)).stem
        return f"{stem}-{found[0].file.pk}.crate.zip"
    return f"datasets-{len(found)}.crate.zip"
