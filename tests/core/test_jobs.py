"""Background work is a row before it is a message: a broker outage loses nothing."""

from __future__ import annotations

from datetime import timedelta

import pytest
from django.utils import timezone
from kombu.exceptions import OperationalError

from labbook.core import jobs
from labbook.core.models import Job
from labbook.core.tasks import run_job, sweep_pending_work

pytestmark = pytest.mark.django_db

calls: list[int] = []


@jobs.job_handler("test_count")
def _count(job: Job) -> dict:
    calls.append(job.pk)
    if job.params.get("fail"):
        raise ValueError("the source shutter did not open")
    return {"n": job.params.get("n", 0) * 2}


@pytest.fixture(autouse=True)
def _reset_calls():
    calls.clear()


def test_enqueue_writes_a_pending_row_then_runs_after_commit(
    member, django_capture_on_commit_callbacks
):
    with django_capture_on_commit_callbacks(execute=True) as callbacks:
        job = jobs.enqueue("test_count", {"n": 21}, actor=member)
        assert Job.objects.get(pk=job.pk).state == Job.State.PENDING  # before commit
    assert len(callbacks) == 1
    job.refresh_from_db()
    assert (job.state, job.result, job.attempts, job.created_by) == ("done", {"n": 42}, 1, member)
    assert job.finished_at >= job.started_at >= job.created_at


def test_a_failure_is_recorded_on_the_row(django_capture_on_commit_callbacks):
    with django_capture_on_commit_callbacks(execute=True):
        job = jobs.enqueue("test_count", {"fail": True})
    job.refresh_from_db()
    assert job.state == "failed"
    assert job.error == "ValueError: the source shutter did not open"


def test_a_finished_job_delivered_again_does_not_run_again(django_capture_on_commit_callbacks):
    with django_capture_on_commit_callbacks(execute=True):
        job = jobs.enqueue("test_count", {"n": 1})
    assert run_job.apply(args=[job.pk]).get()["state"] == "done"
    assert calls == [job.pk]  # the second delivery found it done and left it alone


def test_unknown_kind_fails_at_once():
    with pytest.raises(jobs.UnknownJobKind, match="no handler is registered for job kind 'nope'"):
        jobs.enqueue("nope")
    assert not Job.objects.exists()


def test_broker_outage_leaves_the_job_pending_and_the_sweep_runs_it(
    monkeypatch, django_capture_on_commit_callbacks
):
    def broker_down(*args, **kwargs):
        raise OperationalError("Error 111 connecting to 127.0.0.1:6379. Connection refused.")

    monkeypatch.setattr(run_job, "delay", broker_down)
    with django_capture_on_commit_callbacks(execute=True):
        job = jobs.enqueue("test_count", {"n": 5})
    job.refresh_from_db()
    assert job.state == "pending" and calls == []

    monkeypatch.undo()
    # Too fresh to sweep: the sweep leaves young pending work to the queue.
    assert sweep_pending_work.apply().get()["jobs"] == 0
    Job.objects.filter(pk=job.pk).update(queued_at=timezone.now() - timedelta(minutes=10))
    assert sweep_pending_work.apply().get()["jobs"] == 1
    job.refresh_from_db()
    assert (job.state, job.result) == ("done", {"n": 10})


def test_sweep_restarts_work_left_running_by_a_dead_worker():
    long_ago = timezone.now() - timedelta(hours=2)
    job = Job.objects.create(
        kind="test_count", params={"n": 3}, state="running", started_at=long_ago, attempts=1
    )
    assert sweep_pending_work.apply().get()["jobs"] == 1
    job.refresh_from_db()
    assert (job.state, job.attempts, job.result) == ("done", 2, {"n": 6})


def test_a_job_running_elsewhere_is_not_started_twice():
    job = Job.objects.create(kind="test_count", state="running", started_at=timezone.now())
    assert run_job.apply(args=[job.pk]).get()["state"] == "running"
    assert calls == []


def test_pruning_old_jobs_removes_the_exports_they_wrote_and_nothing_else(settings, tmp_path):
    from datetime import timedelta

    from django.core.files.base import ContentFile
    from django.core.files.storage import default_storage
    from django.utils import timezone

    from labbook.core.models import Job
    from labbook.core.tasks import prune_finished_jobs

    settings.MEDIA_ROOT = str(tmp_path / "files")
    old = timezone.now() - timedelta(days=120)
    export = default_storage.save("exports/crates/1-abc.zip", ContentFile(b"zip"))
    kept_export = default_storage.save("exports/crates/2-def.zip", ContentFile(b"zip"))
    acquired = default_storage.save("acquired/ab/cd/abcd", ContentFile(b"bytes"))
    Job.objects.create(
        kind="provenance.crate", state=Job.State.DONE, finished_at=old,
        result={"storage_name": export},
    )  # fmt: skip
    # A finished job naming a file outside exports/ (a bug, a crafted row) never deletes it.
    Job.objects.create(
        kind="other", state=Job.State.DONE, finished_at=old, result={"storage_name": acquired}
    )
    recent = Job.objects.create(
        kind="provenance.crate", state=Job.State.DONE, finished_at=timezone.now(),
        result={"storage_name": kept_export},
    )  # fmt: skip
    assert prune_finished_jobs(days=90) == 2
    assert not default_storage.exists(export)
    assert default_storage.exists(acquired) and default_storage.exists(kept_export)
    assert list(Job.objects.values_list("pk", flat=True)) == [recent.pk]
