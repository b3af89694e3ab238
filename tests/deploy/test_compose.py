"""docker-compose.yml runs what the project really has: every service's command must exist."""

from __future__ import annotations

import importlib
import shutil
import sys
from pathlib import Path

import pytest
import yaml
from django.core.management import get_commands

ROOT = Path(__file__).resolve().parents[2]
COMPOSE = yaml.safe_load((ROOT / "docker-compose.yml").read_text())
BUILT_SERVICES = {name: spec for name, spec in COMPOSE["services"].items() if "build" in spec}


def check_command(command: list[str]) -> None:
    program = command[0]
    if program == "python":
        assert command[1] == "manage.py" and (ROOT / "manage.py").exists()
        assert command[2] in get_commands(), f"no management command {command[2]!r}"
    elif program == "gunicorn":
        module, _, attribute = command[1].partition(":")
        assert hasattr(importlib.import_module(module), attribute or "application")
        assert shutil.which("gunicorn", path=str(Path(sys.executable).parent))
    elif program == "celery":
        assert command[1:3] == ["-A", "labbook"]
        assert importlib.import_module("labbook").celery_app.main == "labbook"
        assert command[3] in {"worker", "beat"}
        assert shutil.which("celery", path=str(Path(sys.executable).parent))
    else:
        pytest.fail(f"unexpected program {program!r} in {command}")


def test_the_stack_has_database_broker_web_worker_and_beat():
    assert {"db", "redis", "web", "worker", "beat"} <= set(COMPOSE["services"])
    assert {"web", "worker", "beat", "migrate"} <= set(BUILT_SERVICES)


@pytest.mark.parametrize("service", sorted(BUILT_SERVICES))
def test_every_service_command_exists_in_the_project(service):
    check_command(BUILT_SERVICES[service]["command"])


def test_services_share_named_volumes_for_the_database_and_the_files():
    assert {"database", "files"} <= set(COMPOSE["volumes"])
    assert "database:/var/lib/postgresql/data" in COMPOSE["services"]["db"]["volumes"]
    for name in ("web", "worker", "beat"):
        assert "files:/var/lib/labbook/files" in BUILT_SERVICES[name]["volumes"]


def test_services_talk_to_postgresql_and_redis_and_keep_secrets_out_of_the_file():
    environment = BUILT_SERVICES["web"]["environment"]
    assert environment["DATABASE_URL"].startswith("postgresql://")
    assert environment["REDIS_URL"] == "redis://redis:6379/0"
    assert environment["SECRET_KEY"].startswith("${SECRET_KEY:?")


def test_the_image_default_command_exists():
    cmd_line = next(
        line for line in (ROOT / "Dockerfile").read_text().splitlines() if line.startswith("CMD ")
    )
    check_command(yaml.safe_load(cmd_line[4:]))
