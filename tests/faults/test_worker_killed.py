"""Fault: the worker processing a file is killed with SIGKILL in the middle of the task.

The message was not acknowledged (acks_late), so Redis delivers it again and another worker
runs the task: one dataset, one thumbnail, the statistics written once; nothing missing.
"""

from __future__ import annotations

import pytest
from django.conf import settings
from django.core.files.storage import default_storage

from labbook.accounts.actions import mint_token
from labbook.datafiles.models import AcquiredFile

from .conftest import topograph, wait_for

pytestmark = [pytest.mark.worker, pytest.mark.postgres, pytest.mark.django_db(transaction=True)]


def _thumbnails(sha256: str) -> list[str]:
    """Every stored thumbnail of these bytes, under its name or a name Django made up."""
    folder = settings.MEDIA_ROOT / "thumbnails" / sha256[:2]
    return sorted(p.name for p in folder.glob(f"{sha256}*")) if folder.exists() else []


@pytest.mark.parametrize(
    "stage",
    [
        "analyse",  # killed before anything is written
        "resolve",  # killed after the thumbnail is stored, before the row is written
    ],
)
def test_a_task_killed_mid_way_runs_again_and_its_result_is_written_once(
    workers, member, client, stage, tmp_path, fault_report
):
    # A short visibility timeout, so Redis hands the unacknowledged message on in seconds.
    first = workers.start(FAULT_PAUSE_AT=stage, FAULT_VISIBILITY_S="3")
    _, token = mint_token(member)
    response = client.post(
        "/api/v1/files",
        {"file": topograph(7, name=f"killed-{stage}.npy"), "metadata": '{"kind": "topograph"}'},
        headers={"Authorization": f"Bearer {token}"},
    )
    assert response.status_code == 201, response.content
    record = AcquiredFile.objects.get(pk=response.json()["id"])

    marker = tmp_path / f"paused-{stage}"
    wait_for(marker.exists, 60, f"the worker reaching {stage}")
    assert int(marker.read_text()) == first.pid  # the task is running in the first worker
    workers.kill(first)  # SIGKILL: no chance to acknowledge, reject or clean up
    record.refresh_from_db()
    assert record.status == "pending" and record.attempts == 0
    if stage == "resolve":
        assert _thumbnails(record.sha256) == [f"{record.sha256}.png"]  # written before the kill

    workers.start(FAULT_PAUSE_AT=stage, FAULT_VISIBILITY_S="3")  # takes over; no pause now

    def done() -> bool:
        record.refresh_from_db()
        return record.status != "pending"

    wait_for(done, 90, "the killed task running again in the second worker", interval=0.5)
    once = (
        record.status == "ready"
        and record.attempts == 1
        and _thumbnails(record.sha256) == [f"{record.sha256}.png"]
    )
    fault_report(
        f"worker SIGKILLed mid-task ({stage})",
        tries=1,
        survived=int(once),
        lost=int(not once),
        note="redelivered (acks_late); one row, one thumbnail, attempts 1",
    )
    assert record.status == "ready", record.error
    assert record.attempts == 1  # the result was written once
    assert record.stats["rq"] > 0 and record.stats["std"] > 0
    assert AcquiredFile.objects.filter(sha256=record.sha256).count() == 1
    assert _thumbnails(record.sha256) == [f"{record.sha256}.png"]
    assert record.thumbnail_name == f"thumbnails/{record.sha256[:2]}/{record.sha256}.png"
    assert default_storage.exists(record.thumbnail_name)
