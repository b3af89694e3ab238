"""A dataset's provenance as a W3C PROV document (PROV-DM, serialised as PROV-JSON), built with
the ``prov`` library. The mapping is documented in docs/provenance.md; in short:

- entities: the dataset (the bytes), its statistics and preview, the sample and its surface
  state at acquisition, the tip and its state at acquisition, the instrument's state;
- activities: each preparation and each of its steps, the tip's mounting and each conditioning
  event, the acquisition, and labbook's processing of the bytes;
- agents: the people (operators, whoever conditioned the tip), the instrument, and labbook
  itself as the software that processed the file.

Only PROV's own relations are used (wasGeneratedBy, used, wasAssociatedWith, wasDerivedFrom,
wasAttributedTo, specializationOf, wasInformedBy); labbook's facts are attributes in the
``labbook`` namespace, named as the API names them (units in the names).
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from datetime import datetime
from typing import Any

from django.conf import settings
from prov.identifier import QualifiedName
from prov.model import PROV, Namespace, ProvDocument

from labbook.provenance.queries import Provenance, step_values

#: The labbook namespace. A URN by default so that a document's identifiers never depend on
#: the host name a request came in by; a lab that publishes its records may set
#: ``LABBOOK_PROV_NAMESPACE`` to a resolvable base URL.
DEFAULT_NAMESPACE = "urn:labbook:"
PROV_JSON_TYPE = "application/json"  # PROV-JSON has no registered media type of its own


def namespace() -> Namespace:
    return Namespace("labbook", getattr(settings, "LABBOOK_PROV_NAMESPACE", DEFAULT_NAMESPACE))


def _literal(value: Any) -> Any:
    """A value PROV can carry: numbers, text, booleans and aware times as they are; anything
    structured as JSON text."""
    if isinstance(value, bool | int | float | str | datetime | QualifiedName):
        return value
    return json.dumps(value, sort_keys=True, default=str)


def _attrs(ns: Namespace, values: dict[str, Any]) -> dict:
    return {
        (key if key.startswith("prov:") else ns[key]): _literal(value)
        for key, value in values.items()
        if value not in (None, "", [], {})
    }


def _person_label(user) -> str:
    return user.get_full_name() or user.get_username()


class _Builder:
    def __init__(self, document: ProvDocument, ns: Namespace):
        self.doc = document
        self.ns = ns
        self._seen: set[str] = set()

    def id(self, kind: str, pk: Any) -> Any:
        return self.ns[f"{kind}/{pk}"]

    def _once(self, key: str) -> bool:
        if key in self._seen:
            return False
        self._seen.add(key)
        return True

    def person(self, user) -> Any:
        qn = self.id("person", user.pk)
        if self._once(str(qn)):
            self.doc.agent(
                qn,
                _attrs(
                    self.ns,
                    {"prov:type": PROV["Person"], "prov:label": _person_label(user)},
                ),
            )
        return qn

    def instrument(self, instrument) -> Any:
        qn = self.id("instrument", instrument.pk)
        if self._once(str(qn)):
            self.doc.agent(
                qn,
                _attrs(
                    self.ns,
                    {"prov:type": self.ns["Instrument"], "prov:label": instrument.name},
                ),
            )
        return qn

    def software(self) -> Any:
        import labbook

        qn = self.id("software", f"labbook-{labbook.__version__}")
        if self._once(str(qn)):
            self.doc.agent(
                qn,
                _attrs(
                    self.ns,
                    {
                        "prov:type": PROV["SoftwareAgent"],
                        "prov:label": f"labbook {labbook.__version__}",
                        "version": labbook.__version__,
                    },
                ),
            )
        return qn

    def sample(self, sample) -> Any:
        qn = self.id("sample", sample.pk)
        if self._once(str(qn)):
            self.doc.entity(
                qn,
                _attrs(
                    self.ns,
                    {
                        "prov:type": self.ns["Sample"],
                        "prov:label": sample.name,
                        "substrate": sample.substrate,
                        "identifier": sample.identifier,
                    },
                ),
            )
        return qn

    def tip(self, tip) -> Any:
        qn = self.id("tip", tip.pk)
        if self._once(str(qn)):
            self.doc.entity(
                qn,
                _attrs(
                    self.ns,
                    {
                        "prov:type": self.ns["Tip"],
                        "prov:label": tip.name,
                        "material": tip.material,
                        "origin": tip.origin,
                        "sensor_kind": tip.sensor_kind,
                        "stiffness_n_per_m": tip.stiffness_n_per_m,
                        "resonance_frequency_hz": tip.resonance_frequency_hz,
                    },
                ),
            )
        return qn

    def preparation(self, preparation, sample, sample_qn) -> Any:
        qn = self.id("preparation", preparation.pk)
        if not self._once(str(qn)):
            return qn
        self.doc.activity(
            qn,
            preparation.started_at,
            preparation.ended_at,
            _attrs(
                self.ns,
                {
                    "prov:type": self.ns["Preparation"],
                    "prov:label": f"preparation of {sample}",
                    "recipe": None if preparation.recipe is None else str(preparation.recipe),
                    "notes": preparation.notes,
                },
            ),
        )
        self.doc.used(qn, sample_qn)
        self.doc.wasAssociatedWith(qn, self.person(preparation.operator))
        self.doc.wasAssociatedWith(qn, self.instrument(preparation.instrument))
        for step in preparation.steps.all():
            step_qn = self.id("step", step.pk)
            self.doc.activity(
                step_qn,
                None,
                None,
                _attrs(
                    self.ns,
                    {
                        "prov:type": self.ns["PreparationStep"],
                        "prov:label": f"{step.position + 1}. {step.kind}",
                        "kind": step.kind,
                        "position": step.position,
                        "cleans": step.cleans,
                        "partOf": qn,
                        "notes": step.notes,
                        "description": step.description,
                        **step_values(step),
                    },
                ),
            )
            self.doc.wasInformedBy(step_qn, qn)
            self.doc.used(step_qn, sample_qn)
        return qn


def _add_provenance(builder: _Builder, found: Provenance) -> None:
    """Add one dataset's provenance to the builder's document (several datasets share their
    sample, tip, people and instrument records: each is added once)."""
    document, ns = builder.doc, builder.ns
    record = found.file
    file_qn = builder.id("file", record.pk)
    document.entity(
        file_qn,
        _attrs(
            ns,
            {
                "prov:type": ns["Dataset"],
                "prov:label": record.original_name,
                "sha256": record.sha256,
                "size_bytes": record.size_bytes,
                "kind": record.kind,
                "acquired_at": record.acquired_at,
                "bias_v": record.bias_v,
                "setpoint_a": record.setpoint_a,
                "temperature_k": record.temperature_k,
                "channel_name": record.channel_name,
            },
        ),
    )

    acquisition = builder.id("acquisition", record.pk)
    document.activity(
        acquisition,
        record.acquired_at,
        record.acquired_at,
        _attrs(ns, {"prov:type": ns["Acquisition"], "prov:label": "acquisition"}),
    )
    document.wasGeneratedBy(file_qn, acquisition, record.acquired_at)
    if record.instrument is not None:
        document.wasAssociatedWith(acquisition, builder.instrument(record.instrument))
    if found.operator is not None:
        operator = builder.person(found.operator)
        document.wasAssociatedWith(acquisition, operator)
        document.wasAttributedTo(file_qn, operator)

    if found.sample is not None:
        sample_qn = builder.sample(found.sample)
        previous = None
        for preparation in found.preparations:
            previous = builder.preparation(preparation, found.sample, sample_qn)
        surface = found.surface
        surface_qn = builder.id("surface-state", record.pk)
        document.entity(
            surface_qn,
            _attrs(
                ns,
                {
                    "prov:type": ns["SurfaceState"],
                    "prov:label": f"surface of {found.sample} at acquisition",
                    "cleaned_at": None if surface is None else surface.cleaned_at,
                    "coverages": None
                    if surface is None
                    else [
                        {
                            "material": c.material,
                            "coverage_ml": c.coverage_ml,
                            "uncertainty_ml": c.uncertainty_ml,
                            "definition": c.definition,
                        }
                        for c in surface.coverages
                    ],
                    "exposures_langmuir": None if surface is None else surface.exposures_langmuir,
                    "anneal_time_s": None if surface is None else surface.anneal_time_s,
                },
            ),
        )
        document.specializationOf(surface_qn, sample_qn)
        document.wasDerivedFrom(surface_qn, sample_qn)
        if previous is not None:
            document.wasGeneratedBy(surface_qn, previous)
        document.used(acquisition, surface_qn)

    if found.tip is not None:
        tip_qn = builder.tip(found.tip)
        state = found.tip_state
        tip_state_qn = builder.id("tip-state", record.pk)
        document.entity(
            tip_state_qn,
            _attrs(
                ns,
                {
                    "prov:type": ns["TipState"],
                    "prov:label": f"tip {found.tip} at acquisition",
                    "apex_species": None if state is None else state.apex_species,
                    "mounted_at": None
                    if state is None or state.mount is None
                    else state.mount.start,
                },
            ),
        )
        document.specializationOf(tip_state_qn, tip_qn)
        document.wasDerivedFrom(tip_state_qn, tip_qn)
        last = None
        if state is not None and state.mount is not None:
            mount = state.mount
            mount_qn = builder.id("mount", mount.pk)
            if builder._once(str(mount_qn)):
                document.activity(
                    mount_qn,
                    mount.start,
                    mount.end,
                    _attrs(ns, {"prov:type": ns["TipMount"], "prov:label": "tip in the scanner"}),
                )
                document.used(mount_qn, tip_qn)
                document.wasAssociatedWith(mount_qn, builder.instrument(mount.instrument))
            last = mount_qn
            for event in state.events:
                event_qn = builder.id("conditioning", event.pk)
                if builder._once(str(event_qn)):
                    document.activity(
                        event_qn,
                        event.at,
                        event.at,
                        _attrs(
                            ns,
                            {
                                "prov:type": ns["Conditioning"],
                                "prov:label": event.get_kind_display(),
                                "kind": event.kind,
                                "params": event.params,
                                "outcome": event.outcome,
                            },
                        ),
                    )
                    document.used(event_qn, tip_qn)
                    document.wasInformedBy(event_qn, mount_qn)
                    if event.performed_by_id is not None:
                        document.wasAssociatedWith(event_qn, builder.person(event.performed_by))
                last = event_qn
        if last is not None:
            document.wasGeneratedBy(tip_state_qn, last)
        document.used(acquisition, tip_state_qn)

    if found.instrument_state:
        state_qn = builder.id("instrument-state", record.pk)
        snapshot = found.instrument_state
        document.entity(
            state_qn,
            _attrs(
                ns,
                {
                    "prov:type": ns["InstrumentState"],
                    "prov:label": "instrument state at acquisition",
                    "flags": snapshot.get("flags") or None,
                    "channels": snapshot.get("channels") or None,
                    "events": snapshot.get("events") or None,
                },
            ),
        )
        if record.instrument is not None:
            document.wasAttributedTo(state_qn, builder.instrument(record.instrument))
        document.used(acquisition, state_qn)

    if record.processed_at is not None:
        processing = builder.id("processing", record.pk)
        info = found.processing
        document.activity(
            processing,
            record.processed_at,
            record.processed_at,
            _attrs(
                ns,
                {
                    "prov:type": ns["Processing"],
                    "prov:label": "read, measured and previewed by labbook",
                    "reader": info["reader"],
                    "status": info["status"],
                    "parameters": info["parameters"] or None,
                },
            ),
        )
        document.used(processing, file_qn)
        document.wasAssociatedWith(processing, builder.software())
        if record.stats:
            stats_qn = builder.id("statistics", record.pk)
            document.entity(
                stats_qn,
                _attrs(
                    ns,
                    {
                        "prov:type": ns["Statistics"],
                        "prov:label": "statistics of the dataset",
                        "channel": info["statistics_channel"],
                        "names": info["statistics"],
                    },
                ),
            )
            document.wasGeneratedBy(stats_qn, processing)
            document.wasDerivedFrom(stats_qn, file_qn)
        if record.thumbnail_name:
            thumb_qn = builder.id("preview", record.pk)
            document.entity(
                thumb_qn, _attrs(ns, {"prov:type": ns["Preview"], "prov:label": "preview"})
            )
            document.wasGeneratedBy(thumb_qn, processing)
            document.wasDerivedFrom(thumb_qn, file_qn)


def prov_document(found: Provenance | Iterable[Provenance]) -> ProvDocument:
    """The PROV document of one dataset, or of several (a figure) sharing their records."""
    document = ProvDocument()
    builder = _Builder(document, document.add_namespace(namespace()))
    for item in [found] if isinstance(found, Provenance) else found:
        _add_provenance(builder, item)
    return document


def prov_json(found: Provenance | Iterable[Provenance]) -> str:
    return prov_document(found).serialize(format="json")
