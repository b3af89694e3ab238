"""The exports: the PROV document reads back through ``prov`` with the same records and says
what the mapping in docs/provenance.md says; the RO-Crate passes roc-validator (RO-Crate 1.1
profile, offline) with no REQUIRED issue and carries the bytes with their checksums; the API
answers and refuses as the files API does."""

from __future__ import annotations

import hashlib
import io
import json
import os
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest
from prov.model import PROV, ProvDocument

from labbook.provenance import crate, prov
from labbook.provenance.queries import provenance_of

pytestmark = pytest.mark.django_db


def _records(document: ProvDocument, kind: str) -> list:
    return [r for r in document.get_records() if r.get_type().localpart == kind]


def _relations(document: ProvDocument, kind: str) -> set[tuple[str, str]]:
    found = set()
    for record in _records(document, kind):
        first, second = (str(value) for _, value in record.formal_attributes[:2])
        found.add((first, second))
    return found


def test_the_prov_document_round_trips_and_maps_the_history(history, member):
    record = history.files["co"]
    document = prov.prov_document(provenance_of(record))
    text = document.serialize(format="json")
    again = ProvDocument.deserialize(content=text, format="json")
    assert again == document
    assert set(map(str, again.get_records())) == set(map(str, document.get_records()))

    ns = "labbook:"
    file_id, acq = f"{ns}file/{record.pk}", f"{ns}acquisition/{record.pk}"
    person = f"{ns}person/{member.pk}"
    entities = {str(e.identifier) for e in _records(again, "Entity")}
    activities = {str(a.identifier) for a in _records(again, "Activity")}
    agents = {str(a.identifier): a for a in _records(again, "Agent")}
    assert {file_id, f"{ns}sample/{history.sample.pk}", f"{ns}tip/{history.tip.pk}"} <= entities
    # The preparations since the cleaning (not the Ag of the day before), both conditioning
    # events, the mount, the acquisition and the processing are activities.
    p0, p1, p2, p3 = history.preparations
    assert {f"{ns}preparation/{p.pk}" for p in (p1, p2, p3)} <= activities
    assert f"{ns}preparation/{p0.pk}" not in activities
    assert {f"{ns}conditioning/{c.pk}" for c in history.conditioning} <= activities
    assert {acq, f"{ns}processing/{record.pk}", f"{ns}mount/{history.mount.pk}"} <= activities
    assert PROV["Person"] in agents[person].get_asserted_types()
    assert f"{ns}instrument/{history.instrument.pk}" in agents

    generated = _relations(again, "Generation")
    assert (file_id, acq) in generated
    assert (f"{ns}surface-state/{record.pk}", f"{ns}preparation/{p3.pk}") in generated
    last_event = history.conditioning[-1]
    assert (f"{ns}tip-state/{record.pk}", f"{ns}conditioning/{last_event.pk}") in generated
    used = _relations(again, "Usage")
    assert (acq, f"{ns}surface-state/{record.pk}") in used
    assert (acq, f"{ns}tip-state/{record.pk}") in used
    assert (f"{ns}processing/{record.pk}", file_id) in used
    associated = _relations(again, "Association")
    assert (acq, person) in associated
    assert (acq, f"{ns}instrument/{history.instrument.pk}") in associated
    assert (file_id, person) in _relations(again, "Attribution")
    derived = _relations(again, "Derivation")
    assert (f"{ns}statistics/{record.pk}", file_id) in derived
    assert (f"{ns}surface-state/{record.pk}", f"{ns}sample/{history.sample.pk}") in derived

    # Every step is an activity carrying its values and derived doses.
    step = p3.steps.get()
    (step_record,) = [
        a for a in _records(again, "Activity") if str(a.identifier).endswith(f"step/{step.pk}")
    ]
    values = {k.localpart: v for k, v in step_record.attributes}
    assert values["gas"] == "CO"
    assert values["exposure_langmuir"] == pytest.approx(step.exposure_langmuir)
    (file_record,) = [e for e in _records(again, "Entity") if str(e.identifier) == file_id]
    assert {k.localpart: v for k, v in file_record.attributes}["sha256"] == record.sha256


def test_the_exports_read_nothing_more_from_the_database(
    history, django_assert_num_queries, tmp_path
):
    found = [provenance_of(history.files[n]) for n in ("nacl", "co")]
    with django_assert_num_queries(0):
        prov.prov_json(found)
        crate.build_crate(found, tmp_path)


def test_prov_of_several_datasets_names_shared_records_once(history):
    files = [history.files[n] for n in ("nacl", "nacl-2", "co")]
    document = prov.prov_document([provenance_of(f) for f in files])
    identifiers = [str(r.identifier) for r in document.get_records() if r.identifier]
    assert len(identifiers) == len(set(identifiers))
    assert (
        ProvDocument.deserialize(content=document.serialize(format="json"), format="json")
        == document
    )


# --- RO-Crate ---------------------------------------------------------------------------------


def seed_crate_context(cache_path: str, url: str = "https://w3id.org/ro/crate/1.1/context"):
    """roc-validator expands the crate's JSON-LD context over HTTP; offline it reads it from
    its requests_cache, seeded here with the copy the rocrate package ships
    (/work/shared/OFFLINE.md)."""
    import requests
    import rocrate
    from requests_cache import CachedSession
    from urllib3.response import HTTPResponse

    path = os.path.join(os.path.dirname(rocrate.__file__), "data", "ro-crate.jsonld")
    body = Path(path).read_bytes()
    session = CachedSession(cache_name=cache_path, backend="sqlite", expire_after=-1)
    raw = HTTPResponse(
        body=io.BytesIO(body),
        headers={"Content-Type": "application/ld+json"},
        status=200,
        preload_content=False,
        request_url=url,
    )
    response = requests.Response()
    response.status_code, response._content, response.url, response.raw = 200, body, url, raw
    response.headers["Content-Type"] = "application/ld+json"
    response.request = requests.Request("GET", url).prepare()
    session.cache.save_response(response)


def validate(crate_dir: Path, cache: Path) -> dict:
    seed_crate_context(str(cache))
    validator = Path(sys.executable).with_name("rocrate-validator")
    done = subprocess.run(
        [
            str(validator),
            "validate",
            "-p",
            "ro-crate-1.1",
            "--offline",
            "--cache-path",
            str(cache),
            "--no-paging",
            "-f",
            "json",
            str(crate_dir),
        ],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    start = done.stdout.find("{")
    assert start >= 0, done.stdout + done.stderr
    return json.JSONDecoder().raw_decode(done.stdout[start:])[0]


def _unzip(data: bytes, target: Path) -> Path:
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        archive.extractall(target)
    return target


def _issues(report: dict) -> list[dict]:
    return report.get("issues", [])


def test_the_crate_of_one_dataset_passes_the_validator(history, api_as, member, tmp_path):
    record = history.files["co"]
    response = api_as(member).get(f"/files/{record.pk}/crate.zip")
    assert response.status_code == 200
    assert response["Content-Type"] == "application/zip"
    unpacked = _unzip(b"".join(response.streaming_content), tmp_path / "crate")
    metadata = json.loads((unpacked / "ro-crate-metadata.json").read_text())
    graph = {e["@id"]: e for e in metadata["@graph"]}

    # The bytes as stored, under their recorded checksum.
    (data_id,) = [i for i, e in graph.items() if e.get("sha256") == record.sha256]
    assert hashlib.sha256((unpacked / data_id).read_bytes()).hexdigest() == record.sha256
    assert graph[data_id]["contentSize"] == str(record.size_bytes)
    for entity in graph.values():
        if entity["@type"] == "File":
            body = (unpacked / entity["@id"]).read_bytes()
            assert hashlib.sha256(body).hexdigest() == entity["sha256"], entity["@id"]
    # The PROV document inside reads back; the acquisition is a CreateAction.
    document = ProvDocument.deserialize(
        content=(unpacked / "provenance.prov.json").read_text(), format="json"
    )
    assert document == prov.prov_document(provenance_of(record))
    acquisition = graph[f"#acquisition-{record.pk}"]
    assert acquisition["@type"] == "CreateAction"
    assert acquisition["result"] == {"@id": data_id}
    assert {"@id": f"#tip-{history.tip.pk}"} in acquisition["instrument"]
    assert acquisition["agent"] == {"@id": f"#person-{member.pk}"}
    for p in history.preparations[1:]:
        assert graph[f"#preparation-{p.pk}"]["object"] == {"@id": f"#sample-{history.sample.pk}"}

    report = validate(unpacked, tmp_path / "cache")
    required = [i for i in _issues(report) if i.get("severity") == "REQUIRED"]
    assert required == [], required
    assert report.get("passed") is True, report


def test_a_crate_of_several_datasets_for_a_figure(history, api_as, member, tmp_path):
    ids = [history.files[n].pk for n in ("clean", "nacl", "co")]
    api = api_as(member)
    listed = api.get("/crates.zip", ids=",".join(map(str, ids)))
    assert listed.status_code == 200
    posted = api.post("/crates", {"ids": ids, "name": "Figure 2", "description": "NaCl on Cu"})
    assert posted.status_code == 200, posted.content
    unpacked = _unzip(b"".join(posted.streaming_content), tmp_path / "crate")
    metadata = json.loads((unpacked / "ro-crate-metadata.json").read_text())
    graph = {e["@id"]: e for e in metadata["@graph"]}
    assert graph["./"]["name"] == "Figure 2"
    checksums = {e["sha256"] for e in graph.values() if e["@type"] == "File"}
    assert {history.files[n].sha256 for n in ("clean", "nacl", "co")} <= checksums
    # The sample and the tip are one entity each, however many datasets name them.
    assert sum(1 for i in graph if i.startswith("#sample-")) == 1
    report = validate(unpacked, tmp_path / "cache")
    assert [i for i in _issues(report) if i.get("severity") == "REQUIRED"] == []


def test_crate_requests_naming_bad_or_missing_ids(history, api_as, member):
    api = api_as(member)
    assert api.get("/crates.zip", ids="1,x").status_code == 422
    missing = api.get("/crates.zip", ids=f"{history.files['co'].pk},999999")
    assert missing.status_code == 404 and "999999" in missing.json()["detail"]
    assert api.get("/files/999999/provenance").status_code == 404


def test_crates_stream_from_a_scratch_dir_that_is_removed(history, settings, tmp_path):
    settings.DATA_DIR = tmp_path / "data"
    chunks = crate.stream_crate([provenance_of(history.files["clean"])])
    scratch_parent = Path(settings.DATA_DIR) / "tmp"
    assert len(list(scratch_parent.iterdir())) == 1
    assert zipfile.is_zipfile(io.BytesIO(b"".join(chunks)))
    assert list(scratch_parent.iterdir()) == []


# --- the API ------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "path",
    ["/files/{id}/provenance", "/files/{id}/provenance.prov.json", "/files/{id}/crate.zip"],
)
def test_exports_refuse_anonymous_and_outsiders(history, api_as, outsider, path):
    url = path.format(id=history.files["co"].pk)
    assert api_as(None).get(url).status_code == 401
    assert api_as(outsider).get(url).status_code == 403


def test_crates_refuse_anonymous_and_outsiders(history, api_as, outsider):
    ids = str(history.files["co"].pk)
    assert api_as(None).get("/crates.zip", ids=ids).status_code == 401
    assert api_as(outsider).get("/crates.zip", ids=ids).status_code == 403
    assert api_as(outsider).post("/crates", {"ids": [int(ids)]}).status_code == 403


def test_the_provenance_answer(history, api_as, member):
    record = history.files["nacl"]
    read_only = api_as(member, read_only=True)
    response = read_only.get(f"/files/{record.pk}/provenance")
    assert response.status_code == 200, response.content
    body = response.json()
    assert body["checksums"]["sha256"] == record.sha256
    assert body["preparation"] == history.preparations[2].pk
    assert [p["id"] for p in body["preparations"]] == [p.pk for p in history.preparations[1:3]]
    assert body["surface_state"]["coverages"][0]["coverage_ml"] == pytest.approx(0.4)
    assert [e["kind"] for e in body["tip_state"]["conditioning"]] == ["field_emission"]
    assert body["tip_state"]["conditioning"][0]["params"]["voltage_v"] == pytest.approx(60)
    assert body["instrument_state"]["channels"][0]["value"] == pytest.approx(2e-10)
    assert body["operator"]["username"] == member.username
    assert body["neighbours"]["tip_state"]["files"][0]["id"] == history.files["nacl-2"].pk
    prov_response = read_only.get(f"/files/{record.pk}/provenance.prov.json")
    assert prov_response.status_code == 200
    assert ProvDocument.deserialize(content=prov_response.content.decode(), format="json")
