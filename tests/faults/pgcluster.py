"""A PostgreSQL cluster of a fault test's own, which it may restart and crash.

The machine's shared cluster is never stopped: this one is made with initdb in a temporary
directory, listens on a free loopback port (and a socket in that directory only), trusts
local connections, and is stopped and deleted when done. fsync stays on: a crash restart is
then what a production server lives through, committed work surviving by the WAL.

PostgreSQL refuses to run as root; as root, every server command runs as the ``postgres``
OS user (runuser), which owns the directory.
"""

from __future__ import annotations

import atexit
import contextlib
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
import time
from pathlib import Path


def _bindir() -> Path:
    """LABBOOK_PG_BIN, else Debian's newest /usr/lib/postgresql/<major>/bin, else initdb's
    directory on PATH."""
    configured = os.environ.get("LABBOOK_PG_BIN")
    if configured:
        return Path(configured)
    debian = sorted(
        Path("/usr/lib/postgresql").glob("*/bin/initdb"),
        key=lambda path: int(path.parent.parent.name) if path.parent.parent.name.isdigit() else 0,
    )
    if debian:
        return debian[-1].parent
    on_path = shutil.which("initdb")
    return Path(on_path).parent if on_path else Path("/usr/lib/postgresql/15/bin")


BIN = _bindir()
OS_USER = "postgres"
# Small, so a test cluster costs little on a shared machine; enough connections for a few
# server workers, the setup process and the checker.
SETTINGS = {
    "listen_addresses": "'127.0.0.1'",
    "shared_buffers": "'16MB'",
    "max_connections": "30",
    "fsync": "on",
    "logging_collector": "off",
    "log_min_messages": "warning",
}


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _as_root() -> bool:
    return os.geteuid() == 0


def missing() -> str | None:
    """Why a private cluster cannot be made here, or None when it can."""
    for tool in ("initdb", "pg_ctl", "postgres"):
        if not os.access(BIN / tool, os.X_OK):
            return f"PostgreSQL's {tool} in {BIN} (set LABBOOK_PG_BIN to its directory)"
    if _as_root():
        if shutil.which("runuser") is None:
            return "runuser (PostgreSQL refuses root: the private cluster runs as postgres)"
        try:
            pwd.getpwnam(OS_USER)
        except KeyError:
            return f"an OS user {OS_USER!r} to run the private cluster (it refuses root)"
    return None


class PrivatePostgres:
    """initdb, start, restart, crash and delete a cluster on a free loopback port.

    Use it as a context manager, or call ``start()`` and, always, ``destroy()``.
    """

    def __init__(self, *, start_timeout_s: float = 60):
        self.start_timeout_s = start_timeout_s
        self.root: Path | None = None
        self.port = 0

    # --- paths and addresses -------------------------------------------------------------

    @property
    def data(self) -> Path:
        assert self.root is not None, "the cluster was not made"
        return self.root / "data"

    @property
    def log(self) -> Path:
        assert self.root is not None, "the cluster was not made"
        return self.root / "server.log"

    def url(self, database: str = "postgres", **options: str) -> str:
        query = "&".join(f"{key}={value}" for key, value in options.items())
        return f"postgresql://{OS_USER}@127.0.0.1:{self.port}/{database}" + (
            f"?{query}" if query else ""
        )

    def log_tail(self, chars: int = 3000) -> str:
        try:
            return self.log.read_text(errors="replace")[-chars:]
        except (OSError, AssertionError):
            return ""

    # --- commands ------------------------------------------------------------------------

    def _run(self, *args: str, timeout: float = 60) -> subprocess.CompletedProcess:
        command = [str(BIN / args[0]), *args[1:]]
        if _as_root():
            command = ["runuser", "-u", OS_USER, "--", *command]
        env = {k: v for k, v in os.environ.items() if not k.startswith("PG")}
        done = subprocess.run(
            command,
            cwd=self.root,
            env={**env, "LC_ALL": "C.UTF-8"},
            capture_output=True,
            text=True,
            timeout=timeout,
        )
        if done.returncode != 0:
            raise RuntimeError(
                f"{' '.join(args[:2])} failed ({done.returncode}): {done.stdout}{done.stderr}"
                f"\n--- server log ---\n{self.log_tail()}"
            )
        return done

    def _make(self) -> None:
        self.root = Path(tempfile.mkdtemp(prefix="labbook-pg-"))
        if _as_root():
            owner = pwd.getpwnam(OS_USER)
            os.chown(self.root, owner.pw_uid, owner.pw_gid)
        atexit.register(self.destroy)
        # --no-sync: only initdb's own files skip fsync (no OS crash is simulated); the
        # server itself runs with fsync on.
        self._run("initdb", "-D", str(self.data), "-U", OS_USER, "-A", "trust", "-E", "UTF8",
                  "--no-sync", "--no-instructions")  # fmt: skip
        settings = {**SETTINGS, "unix_socket_directories": f"'{self.root}'"}
        with open(self.data / "postgresql.conf", "a") as conf:
            conf.write("\n# labbook private fault-test cluster\n")
            conf.writelines(f"{key} = {value}\n" for key, value in settings.items())

    def start(self) -> None:
        """Make the cluster on first use, then start it; returns when it accepts connections."""
        if self.root is None:
            self._make()
        for attempt in range(3):
            if not self.port or attempt:
                self.port = _free_port()
            try:
                self._pg_ctl("start", "-l", str(self.log), "-o", f"-p {self.port}")
                return
            except RuntimeError:
                # The free port may have been taken between the probe and the bind.
                if attempt == 2 or "Address already in use" not in self.log_tail():
                    raise

    def _pg_ctl(self, action: str, *args: str) -> None:
        timeout = self.start_timeout_s
        self._run("pg_ctl", action, "-D", str(self.data), "-w", "-t", str(int(timeout)), *args,
                  timeout=timeout + 10)  # fmt: skip

    def restart(self) -> None:
        """A clean restart (``pg_ctl restart -m fast``): sessions are ended, open transactions
        rolled back, then the server comes back on the same port."""
        self._pg_ctl("restart", "-m", "fast", "-l", str(self.log), "-o", f"-p {self.port}")

    def crash(self) -> None:
        """Stop at once without a checkpoint (``-m immediate``), as a crash does; the next
        ``start()`` replays the WAL."""
        self._pg_ctl("stop", "-m", "immediate")

    def stop(self) -> None:
        self._pg_ctl("stop", "-m", "fast")

    def running(self) -> bool:
        return self.root is not None and (self.data / "postmaster.pid").exists()

    def accepts(self) -> bool:
        try:
            with socket.create_connection(("127.0.0.1", self.port), timeout=0.5):
                return True
        except OSError:
            return False

    def create_database(self, name: str) -> None:
        import psycopg
        from psycopg import sql

        with psycopg.connect(self.url(), autocommit=True, connect_timeout=10) as conn:
            conn.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))

    def destroy(self) -> None:
        """Stop immediately and delete everything; safe to call twice, and at exit."""
        atexit.unregister(self.destroy)
        if self.root is None:
            return
        if self.running():
            with contextlib.suppress(RuntimeError, subprocess.TimeoutExpired):
                self._pg_ctl("stop", "-m", "immediate")
        if self.running():
            # pg_ctl could not stop it: end our own postmaster by the pid it wrote.
            with contextlib.suppress(OSError, ValueError, IndexError):
                pid = int((self.data / "postmaster.pid").read_text().split()[0])
                os.kill(pid, 9)
                time.sleep(0.5)
        shutil.rmtree(self.root, ignore_errors=True)
        self.root = None

    def __enter__(self) -> PrivatePostgres:
        try:
            self.start()
        except BaseException:
            self.destroy()
            raise
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.destroy()
