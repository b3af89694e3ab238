"""A crate of datasets ticked on the search page is a durable job: the worker writes the ZIP into
the file storage (the datasets' own bytes, their checksums, ro-crate-metadata.json), reporting
how many datasets it has written; the crate page follows it and serves the ZIP to lab members
only, and only for crate jobs. A bad request names its problem and records no job."""

from __future__ import annotations

import hashlib
import io
import json
import ntpath
import posixpath
import re
import zipfile
from email.message import Message

import pytest
from django.core.files.storage import default_storage
from django.test import Client

from labbook.core.jobs import handler_for
from labbook.core.models import Job
from labbook.core.tasks import run_job
from labbook.provenance import crate
from labbook.provenance.export_jobs import CRATE_JOB, STORAGE_FOLDER

pytestmark = pytest.mark.django_db

NEW = "/provenance/crates/new/"


def as_client(user) -> Client:
    client = Client()
    client.force_login(user)
    return client


def html(response) -> str:
    return response.content.decode()


@pytest.fixture
def make_crate(member, django_capture_on_commit_callbacks):
    """POST the crate form as a member; the job runs when the request's transaction commits
    (eagerly here, as a worker would)."""

    def make(ids, **fields):
        with django_capture_on_commit_callbacks(execute=True):
            return as_client(member).post(NEW, {"ids": [str(i) for i in ids], **fields})

    return make


def _members(zip_bytes: bytes) -> dict[str, bytes]:
    with zipfile.ZipFile(io.BytesIO(zip_bytes)) as archive:
        return {name: archive.read(name) for name in archive.namelist()}


def _stored(job: Job) -> bytes:
    with default_storage.open(job.result["storage_name"], "rb") as handle:
        return handle.read()


def test_the_job_writes_the_datasets_bytes_and_metadata_into_storage(
    history, member, make_crate, monkeypatch
):
    chosen = [history.files["nacl"], history.files["co"]]
    seen: list[dict] = []
    real = crate.stream_crate

    def watching(found, *, progress=None, **labels):
        # What the row says before the first dataset and after each one is written.
        job = Job.objects.get(kind=CRATE_JOB)
        seen.append(job.result)

        def watch(done: int, total: int) -> None:
            progress(done, total)
            seen.append(Job.objects.get(pk=job.pk).result)

        return real(found, progress=watch, **labels)

    monkeypatch.setattr(crate, "stream_crate", watching)
    response = make_crate(
        [f.pk for f in chosen], name="Figure 2 <b>", description="NaCl islands, then CO"
    )

    job = Job.objects.get(kind=CRATE_JOB)
    assert response.status_code == 303
    assert response["Location"] == f"/provenance/crates/{job.pk}/"
    assert job.state == Job.State.DONE, job.error
    assert job.created_by == member
    assert job.params == {
        "ids": [f.pk for f in chosen],
        "name": "Figure 2 <b>",
        "description": "NaCl islands, then CO",
        "actor": member.pk,
    }
    assert seen == [
        {"datasets": 2, "done": 0},
        {"datasets": 2, "done": 1},
        {"datasets": 2, "done": 2},
    ]

    result = job.result
    assert re.fullmatch(rf"{STORAGE_FOLDER}/{job.pk}-[0-9a-f]{{16}}\.zip", result["storage_name"])
    body = _stored(job)
    assert result["size_bytes"] == len(body) == default_storage.size(result["storage_name"])
    assert result["sha256"] == hashlib.sha256(body).hexdigest()
    assert result["datasets"] == result["done"] == 2
    # The title gives the download's name: "Figure 2 <b>" keeps its letters and digits, the
    # space and the markup each become one '-'.
    assert result["filename"] == "Figure-2-b.crate.zip"

    members = _members(body)
    assert "ro-crate-metadata.json" in members
    for record in chosen:
        entry = f"datasets/{record.pk}/{record.original_name}"
        assert hashlib.sha256(members[entry]).hexdigest() == record.sha256
        with default_storage.open(record.storage_name, "rb") as handle:
            assert members[entry] == handle.read()
    metadata = json.loads(members["ro-crate-metadata.json"])
    graph = {item["@id"]: item for item in metadata["@graph"]}
    assert graph["./"]["name"] == "Figure 2 <b>"
    assert graph["./"]["description"] == "NaCl islands, then CO"
    for record in chosen:
        described = graph[f"datasets/{record.pk}/{record.original_name}"]
        assert described["sha256"] == record.sha256
        assert described["contentSize"] == str(record.size_bytes)
    assert not any(f"datasets/{history.files['clean'].pk}/" in name for name in members)
    # The title typed is shown as text on the crate's page, never as markup.
    page = html(as_client(member).get(response["Location"]))
    assert "<h1>Figure 2 &lt;b&gt;</h1>" in page and "<b>" not in page


def test_running_the_job_again_rewrites_the_same_zip(history, make_crate):
    make_crate([history.files["clean"].pk])
    job = Job.objects.get(kind=CRATE_JOB)
    first = job.result
    again = handler_for(CRATE_JOB)(job)
    assert again["storage_name"] == first["storage_name"]
    assert again["size_bytes"] > 0
    _, stored = default_storage.listdir(STORAGE_FOLDER)
    assert stored == [first["storage_name"].rsplit("/", 1)[1]]
    assert first["filename"] == f"clean-{history.files['clean'].pk}.crate.zip"


@pytest.mark.parametrize(
    ("ids", "fields", "says"),
    [
        ([], {}, "no dataset was selected"),
        (["x7"], {}, "“x7” is not a dataset id"),
        (["{clean}", "999999"], {}, "no dataset 999999: it is not in this labbook"),
        (["{clean}"], {"name": "F" * 301}, "the title has 301 characters; at most 300 fit"),
        (["{clean}"], {"name": "F\x00"}, "the title has a NUL character (U+0000)"),
        (["{clean}"], {"description": "\x00"}, "the description has a NUL character (U+0000)"),
    ],
)
def test_a_bad_request_names_the_problem_and_records_no_job(history, make_crate, ids, fields, says):
    clean = history.files["clean"]
    response = make_crate([i.format(clean=clean.pk) for i in ids], **fields)
    assert response.status_code == 422
    text = html(response)
    assert 'role="alert"' in text and says in text
    assert not Job.objects.filter(kind=CRATE_JOB).exists()
    if "{clean}" in ids:
        # What was ticked is kept, ticked, on the page that names the problem.
        assert re.search(rf'<input type="checkbox"[^>]*value="{clean.pk}" checked>', text)


def test_too_many_datasets_are_refused_by_count(history, make_crate, monkeypatch):
    monkeypatch.setattr(crate, "MAX_DATASETS", 1)
    response = make_crate([history.files["clean"].pk, history.files["co"].pk])
    assert response.status_code == 422
    assert "2 datasets were selected, and a crate holds at most 1" in html(response)
    assert not Job.objects.filter(kind=CRATE_JOB).exists()


def test_ids_typed_on_the_crate_page_join_the_ticked_ones(history, make_crate):
    clean, co = history.files["clean"], history.files["co"]
    make_crate([clean.pk], more_ids=f"{co.pk}, {clean.pk}")
    assert Job.objects.get(kind=CRATE_JOB).params["ids"] == [clean.pk, co.pk]


def test_the_crate_page_polls_until_done_then_offers_the_download(
    history, member, make_crate, monkeypatch
):
    record = history.files["nacl"]
    # Held before it runs, as a busy worker would leave it.
    monkeypatch.setattr(run_job, "delay", lambda job_id: None)
    make_crate([record.pk], name="Figure 3")
    job = Job.objects.get(kind=CRATE_JOB)
    assert job.state == Job.State.PENDING
    client = as_client(member)

    page = html(client.get(f"/provenance/crates/{job.pk}/"))
    assert "<h1>Figure 3</h1>" in page
    assert f'href="/datasets/{record.pk}/"' in page and record.original_name in page
    assert '<progress max="1" value="0"' in page
    assert f'hx-get="/provenance/crates/{job.pk}/progress/?polls=0"' in page
    assert 'hx-trigger="every 1s"' in page
    assert "Download the crate" not in page

    run_job.apply(args=[job.pk])
    part = html(client.get(f"/provenance/crates/{job.pk}/progress/", {"polls": "3"}))
    assert "hx-trigger" not in part  # done: the polling stops
    assert '<progress max="1" value="1"' in part
    assert f'href="/provenance/crates/{job.pk}/download/"' in part
    assert 'id="crate-announce" hx-swap-oob="innerHTML">The crate is ready' in part

    download = client.get(f"/provenance/crates/{job.pk}/download/")
    assert download.status_code == 200
    assert download["Content-Type"] == "application/zip"
    assert download["Content-Disposition"] == 'attachment; filename="Figure-3.crate.zip"'
    body = b"".join(download.streaming_content)
    assert body == _stored(Job.objects.get(pk=job.pk))
    members = _members(body)
    entry = f"datasets/{record.pk}/{record.original_name}"
    assert hashlib.sha256(members[entry]).hexdigest() == record.sha256


def test_the_polls_slow_down_on_a_page_left_open(history, member, make_crate, monkeypatch):
    monkeypatch.setattr(run_job, "delay", lambda job_id: None)
    make_crate([history.files["nacl"].pk])
    job = Job.objects.get(kind=CRATE_JOB)
    part = html(as_client(member).get(f"/provenance/crates/{job.pk}/progress/", {"polls": 500}))
    assert 'hx-trigger="every 10s"' in part and "waiting for a worker" in part


def test_a_failed_job_shows_its_error(history, member, make_crate, monkeypatch):
    monkeypatch.setattr(run_job, "delay", lambda job_id: None)
    make_crate([history.files["co"].pk])
    job = Job.objects.get(kind=CRATE_JOB)
    # The dataset vanishes from the job's list between the request and the worker (a crafted
    # or corrupted row): the job fails and says which dataset.
    Job.objects.filter(pk=job.pk).update(params={**job.params, "ids": [999999]})
    run_job.apply(args=[job.pk])
    job.refresh_from_db()
    assert job.state == Job.State.FAILED
    assert "no dataset 999999" in job.error
    client = as_client(member)
    page = html(client.get(f"/provenance/crates/{job.pk}/"))
    assert "The crate could not be made" in page and "no dataset 999999" in page
    assert "hx-trigger" not in page
    # Its download goes back to the page that explains.
    download = client.get(f"/provenance/crates/{job.pk}/download/")
    assert download.status_code == 303
    assert download["Location"] == f"/provenance/crates/{job.pk}/"


def test_crate_pages_need_a_lab_login(history, outsider, make_crate):
    make_crate([history.files["co"].pk])
    job = Job.objects.get(kind=CRATE_JOB)
    paths = [f"/provenance/crates/{job.pk}/{tail}" for tail in ("", "progress/", "download/")]
    for path in [*paths, NEW]:
        anonymous = Client().get(path)
        assert anonymous.status_code == 302, path
        assert anonymous["Location"].startswith("/login/?next="), path
        assert as_client(outsider).get(path).status_code == 403, path
    refused = as_client(outsider).post(NEW, {"ids": [str(history.files["co"].pk)]})
    assert refused.status_code == 403
    assert Client().post(NEW, {"ids": [str(history.files["co"].pk)]}).status_code == 302
    assert Job.objects.filter(kind=CRATE_JOB).count() == 1


def test_other_kinds_of_job_are_not_crates(history, member, make_crate):
    make_crate([history.files["co"].pk])
    crate_job = Job.objects.get(kind=CRATE_JOB)
    # A job of another kind whose result names the same stored ZIP is still not served.
    other = Job.objects.create(
        kind="worker_round_trip", state=Job.State.DONE, result=crate_job.result, params={}
    )
    client = as_client(member)
    for tail in ("", "progress/", "download/"):
        assert client.get(f"/provenance/crates/{other.pk}/{tail}").status_code == 404
    assert client.get(f"/provenance/crates/{crate_job.pk}/download/").status_code == 200


def test_the_crate_csrf_is_checked(history, member):
    client = Client(enforce_csrf_checks=True)
    client.force_login(member)
    response = client.post(NEW, {"ids": [str(history.files["co"].pk)]})
    assert response.status_code == 403
    assert not Job.objects.filter(kind=CRATE_JOB).exists()


def test_the_search_page_has_a_labelled_box_per_tile_in_a_form_of_its_own(history, member):
    client = as_client(member)
    text = html(client.get("/datasets/", {"bias_min": "-1 V"}))
    search = re.search(r'<form class="card ds-filters".*?</form>', text, re.S)[0]
    assert 'method="get"' in search and "crate-pick-" not in search
    picker = re.search(r'<form class="card crate-pick".*?</form>', text, re.S)[0]
    assert 'method="post"' in picker and 'action="/provenance/crates/new/"' in picker
    assert 'name="csrfmiddlewaretoken"' in picker
    assert 'name="next" value="/datasets/?bias_min=-1+V"' in picker
    assert "Make a crate of the selected datasets" in picker
    for record in history.files.values():
        box = re.search(rf'<input type="checkbox" id="crate-pick-{record.pk}"[^>]*>', text)[0]
        assert f'value="{record.pk}"' in box and 'form="crate-form"' in box
        assert f'<label for="crate-pick-{record.pk}">Add to crate' in text
    # The search itself still filters as before.
    assert client.get("/datasets/", {"bias_min": "5 V"}).status_code == 200
    assert "crate-pick-" not in html(client.get("/datasets/", {"bias_min": "5 V"}))


def test_the_dataset_page_links_to_a_crate_with_other_datasets(history, member):
    record = history.files["co"]
    client = as_client(member)
    text = html(client.get(f"/datasets/{record.pk}/"))
    link = re.search(
        r'href="(/provenance/crates/new/\?ids=\d+[^"]*)">Make a crate with other', text
    )
    assert link, "no link to make a crate from the exports card"
    page = client.get(link[1].replace("&amp;", "&"))
    assert page.status_code == 200
    assert re.search(rf'<input type="checkbox"[^>]*value="{record.pk}" checked>', html(page))


def _disposition_filename(header: str) -> str | None:
    """The file name a mail/HTTP header parser (the standard library's, RFC 2183/6266
    syntax) reads from a Content-Disposition, independently of how Django wrote it."""
    message = Message()
    message["Content-Disposition"] = header
    return message.get_filename()


def _download(member, job: Job):
    response = as_client(member).get(f"/provenance/crates/{job.pk}/download/")
    assert response.status_code == 200
    b"".join(response.streaming_content)
    return response


def test_a_titled_crate_downloads_under_its_title_with_accents_dropped(history, member, make_crate):
    make_crate([history.files["nacl"].pk, history.files["co"].pk], name="Ångström steps on Cu(111)")
    job = Job.objects.get(kind=CRATE_JOB)
    # Unicode's canonical decomposition: Å is A + U+030A (ring above), ö is o + U+0308
    # (diaeresis); without the combining marks the letters are plain A and o.
    name = "Angstrom-steps-on-Cu-111.crate.zip"
    assert job.result["filename"] == name
    download = _download(member, job)
    assert download["Content-Disposition"] == f'attachment; filename="{name}"'
    assert _disposition_filename(download["Content-Disposition"]) == name
    part = html(as_client(member).get(f"/provenance/crates/{job.pk}/progress/"))
    assert f'download="{name}"' in part


@pytest.mark.parametrize("title", ["", "   ", "日本語の結晶", "//..//", "CON", "<>"])
def test_a_title_leaving_no_usable_name_falls_back_to_the_dataset_name(
    history, member, make_crate, title
):
    record = history.files["nacl"]
    make_crate([record.pk], name=title)
    job = Job.objects.get(kind=CRATE_JOB)
    assert job.state == Job.State.DONE, job.error
    name = f"nacl-{record.pk}.crate.zip"
    assert job.result["filename"] == name
    assert _disposition_filename(_download(member, job)["Content-Disposition"]) == name


def test_a_title_leaving_no_usable_name_falls_back_to_the_count(history, make_crate):
    make_crate([history.files["nacl"].pk, history.files["co"].pk], name="«»")
    assert Job.objects.get(kind=CRATE_JOB).result["filename"] == "datasets-2.crate.zip"


SAFE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")


@pytest.mark.parametrize(
    ("title", "stem"),
    [
        ("Figure 3 <b>x</b>", "Figure-3-b-x-b"),
        ("../../etc/passwd", "etc-passwd"),
        ("..\\..\\Windows\\win.ini", "Windows-win.ini"),
        ('a"; filename="evil.exe', "a-filename-evil.exe"),
        ("x\r\nSet-Cookie: s=1", "x-Set-Cookie-s-1"),
        ("\x1b[2J\x07bell\ttab\x7fdel", "2J-bell-tab-del"),
        ("...hidden..name...", "hidden.name"),
        ("a" * 79 + " " + "b" * 50, "a" * 79),
    ],
)
def test_a_hostile_title_gives_a_harmless_name(title, stem):
    name = crate.crate_filename([], title=title)
    assert name == f"{stem}.crate.zip"
    # Whatever was typed: one plain name on POSIX and Windows, no "..", no leading dot,
    # nothing but ASCII letters, digits, '-', '_' and '.', and a stem of at most 80.
    assert posixpath.basename(name) == ntpath.basename(name) == name
    assert SAFE.fullmatch(name) and ".." not in name
    assert len(name.removesuffix(".crate.zip")) <= 80


def test_a_hostile_title_downloads_under_a_harmless_name(history, member, make_crate):
    make_crate(
        [history.files["co"].pk],
        name='../..\\"quoted"\x1b[31m\r\n; filename=evil.sh',
    )
    job = Job.objects.get(kind=CRATE_JOB)
    assert job.state == Job.State.DONE, job.error
    name = "quoted-31m-filename-evil.sh.crate.zip"
    assert job.result["filename"] == name
    header = _download(member, job)["Content-Disposition"]
    assert header == f'attachment; filename="{name}"'
    assert _disposition_filename(header) == name
