"""A correction touching many datasets re-resolves them in a durable background job, not in the
request; a small one stays immediate. Either way the history names the corrector."""

from __future__ import annotations

import pytest

from labbook.core.jobs import handler_for
from labbook.core.models import Job
from labbook.core.records import save_record
from labbook.datafiles.models import AcquiredFile
from labbook.provenance import audit
from labbook.provenance.audit import record_history
from labbook.provenance.tasks import RERESOLVE_JOB

pytestmark = pytest.mark.django_db

NAMES = ("a", "b", "c")


def _fresh(record) -> AcquiredFile:
    return AcquiredFile.objects.get(pk=record.pk)


def _correct_the_tip(lab, manager, capture) -> None:
    mount = lab.mount
    mount.tip = lab.other_tip
    with capture(execute=True):
        save_record(mount, manager)
        # Nothing is re-resolved before the correction commits.
        assert all(_fresh(lab.files[n]).tip == lab.tip for n in NAMES)


def test_a_large_correction_runs_as_one_job_naming_the_corrector(
    lab, manager, monkeypatch, django_capture_on_commit_callbacks
):
    monkeypatch.setattr(audit, "IMMEDIATE_RERESOLVE_LIMIT", 2)  # three datasets is "large"
    _correct_the_tip(lab, manager, django_capture_on_commit_callbacks)

    job = Job.objects.get(kind=RERESOLVE_JOB)
    assert job.state == Job.State.DONE, job.error
    assert job.created_by == manager
    assert job.params["model"] == "tips.TipMount" and job.params["pk"] == lab.mount.pk
    assert sorted(job.params["files"]) == sorted(lab.files[n].pk for n in NAMES)
    assert job.result == {"files": 3, "changed": 3}
    for name in NAMES:
        record = _fresh(lab.files[name])
        assert record.tip == lab.other_tip
        assert record.lineage["tip_state"]["tip"] == lab.other_tip.pk
        latest = record_history(record)[0]
        assert latest.user == manager
        assert f"tip mount #{lab.mount.pk}" in latest.reason
        assert {c.field: (c.old, c.new) for c in latest.changes}["tip"] == ("W-11", "PtIr-4")


def test_running_the_job_again_changes_nothing(
    lab, manager, monkeypatch, django_capture_on_commit_callbacks
):
    monkeypatch.setattr(audit, "IMMEDIATE_RERESOLVE_LIMIT", 2)
    _correct_the_tip(lab, manager, django_capture_on_commit_callbacks)
    job = Job.objects.get(kind=RERESOLVE_JOB)
    rows = {n: lab.files[n].history.count() for n in NAMES}
    lineages = {n: _fresh(lab.files[n]).lineage for n in NAMES}

    assert handler_for(RERESOLVE_JOB)(job) == {"files": 3, "changed": 0}
    assert {n: lab.files[n].history.count() for n in NAMES} == rows
    assert {n: _fresh(lab.files[n]).lineage for n in NAMES} == lineages


def test_a_small_correction_stays_immediate(lab, manager, django_capture_on_commit_callbacks):
    assert audit.IMMEDIATE_RERESOLVE_LIMIT >= 3
    _correct_the_tip(lab, manager, django_capture_on_commit_callbacks)
    assert not Job.objects.filter(kind=RERESOLVE_JOB).exists()
    for name in NAMES:
        record = _fresh(lab.files[name])
        assert record.tip == lab.other_tip
        assert record_history(record)[0].user == manager


def test_a_dataset_that_fails_does_not_stop_the_others_and_is_named(
    lab, manager, monkeypatch, django_capture_on_commit_callbacks
):
    monkeypatch.setattr(audit, "IMMEDIATE_RERESOLVE_LIMIT", 2)
    broken = lab.files["b"].pk
    real = audit.reresolve_file

    def flaky(file_id: int, **kwargs) -> bool:
        if file_id == broken:
            raise OSError("the archive volume is offline")
        return real(file_id, **kwargs)

    monkeypatch.setattr(audit, "reresolve_file", flaky)
    _correct_the_tip(lab, manager, django_capture_on_commit_callbacks)

    job = Job.objects.get(kind=RERESOLVE_JOB)
    assert job.state == Job.State.FAILED
    assert f"files {broken}" in job.error and "1 of 3" in job.error
    assert _fresh(lab.files["a"]).tip == lab.other_tip
    assert _fresh(lab.files["c"]).tip == lab.other_tip
    assert _fresh(lab.files["b"]).tip == lab.tip  # left for a second run, not lost

    monkeypatch.setattr(audit, "reresolve_file", real)
    assert handler_for(RERESOLVE_JOB)(job) == {"files": 3, "changed": 1}
    assert _fresh(lab.files["b"]).tip == lab.other_tip
