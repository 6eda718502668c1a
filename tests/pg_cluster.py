"""A throwaway PostgreSQL server for the test-suite, built from Debian's binaries.

Each ``PgCluster`` is a private server in its own temporary directory: its own data
directory, its own unix socket directory and a free loopback TCP port. Nothing is shared
with the Debian default cluster (``/var/lib/postgresql/N/main``), which is never touched,
so two test runs, or a run beside a developer's own server, cannot clash.

This module does not import pytest or psycopg, so it can be used from a script too; the
pytest side (skip or fail, the session fixture) is in ``tests/pg_fixtures.py``.
"""

from __future__ import annotations

import atexit
import contextlib
import os
import pwd
import re
import shutil
import signal
import socket
import subprocess
import tempfile
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from types import TracebackType
from typing import Literal, Self
from urllib.parse import quote, urlencode

PG_ROOT = Path("/usr/lib/postgresql")
# Server and client programs this module runs; a bin directory missing one is unusable.
NEEDED = ("initdb", "pg_ctl", "postgres", "createdb")
SUPERUSER = "postgres"
DEFAULT_DATABASE = "capnote_test"
# An unquoted PostgreSQL identifier at most 63 bytes long: safe in a URL and in SQL as is.
DATABASE_NAME = re.compile(r"[a-z_][a-z0-9_]{0,62}")
# Appended to the initdb-made postgresql.conf. Durability is worthless for a server whose
# data is deleted at the end of the run, and these three settings are most of the cost of
# every commit. The settings live in the file rather than in `pg_ctl -o` so that restart()
# keeps them and a temporary directory name never needs shell quoting.
SPEED_SETTINGS = {
    "fsync": "off",
    "synchronous_commit": "off",
    "full_page_writes": "off",
}

StopMode = Literal["smart", "fast", "immediate"]

# Bounded waits, in seconds: every subprocess gets one, so a broken server fails the test
# run instead of hanging it. pg_ctl is also given its own -t, a little shorter than ours,
# so that it normally gives up first and reports why.
INITDB_TIMEOUT = 120.0
PG_CTL_WAIT = 60
PG_CTL_TIMEOUT = PG_CTL_WAIT + 15.0
CLIENT_TIMEOUT = 30.0
START_ATTEMPTS = 3


class PgClusterError(RuntimeError):
    """The server could not be set up, started, used or stopped."""


def _version_key(bindir: Path) -> tuple[int, ...]:
    # Directory names are versions such as "15" or "9.6"; anything else sorts lowest.
    parts = bindir.parent.name.split(".")
    return tuple(int(p) for p in parts) if all(p.isdigit() for p in parts) else (-1,)


def find_bindir(root: Path = PG_ROOT) -> Path | None:
    """The highest-versioned ``/usr/lib/postgresql/*/bin`` that has every needed program."""
    candidates = [
        d for d in root.glob("*/bin") if all(os.access(d / name, os.X_OK) for name in NEEDED)
    ]
    return max(candidates, key=_version_key, default=None)


def available() -> bool:
    """Whether the PostgreSQL server binaries are installed."""
    return find_bindir() is not None


def required() -> bool:
    """Whether a missing PostgreSQL must fail the run: in CI a skip would hide it."""
    return (
        os.environ.get("CI", "").lower() == "true"
        or os.environ.get("CAPNOTE_REQUIRE_POSTGRES") == "1"
    )


def _free_port() -> int:
    # The kernel picks a port nobody holds now. Another process may take it before the
    # server binds it, which is why start() retries with a new port on "address in use".
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        port: int = sock.getsockname()[1]
        return port


def _child_env() -> dict[str, str]:
    # PG* variables (PGDATA, PGPORT, PGHOST, PGUSER, ...) from the caller's shell would
    # redirect initdb, pg_ctl or createdb to another server; English messages make the log
    # tail in errors readable and "address already in use" recognisable.
    env = {k: v for k, v in os.environ.items() if not k.startswith("PG")}
    env["LC_ALL"] = "C"
    return env


def _runuser() -> str:
    # /usr/sbin is not on every root PATH (e.g. a bare `docker exec`).
    found = shutil.which("runuser") or next(
        (p for p in ("/usr/sbin/runuser", "/sbin/runuser") if os.access(p, os.X_OK)), None
    )
    if found is None:
        raise PgClusterError("running as root needs runuser (util-linux) to drop to postgres")
    return found


class PgCluster:
    """One private PostgreSQL server: ``start()``, use ``url``, then ``stop()``.

    Layout under a fresh temporary directory: ``data/`` (the cluster), ``sock/`` (the unix
    socket) and ``postgres.log``. The superuser is ``postgres`` with trust authentication,
    on the socket and on 127.0.0.1 only.

    initdb and the server refuse to run as root, so as root the server programs run as
    the ``os_user`` system user (``runuser -u postgres -- ...``) and the temporary
    directory is handed to that user with chown; otherwise they run as the current user.
    Client programs (createdb) run as the caller: root may use any socket.
    """

    def __init__(
        self,
        *,
        bindir: Path | None = None,
        database: str = DEFAULT_DATABASE,
        os_user: str = SUPERUSER,
        base_dir: Path | None = None,
        settings: Mapping[str, str] | None = None,
    ) -> None:
        """``settings``: more postgresql.conf lines, over the defaults; values as written
        in that file, e.g. ``{"max_connections": "5"}`` for a pool-exhaustion test or
        ``{"synchronous_commit": "on"}`` for a test that commits and then crashes."""
        _check_database_name(database)
        self._settings = dict(settings or {})
        self.database = database
        self._bindir = bindir
        self._os_user = os_user
        self._base_dir = base_dir
        self._tmp: Path | None = None
        self._port: int | None = None
        self._running = False
        # Seconds per phase of the last start(), for spotting a slow machine in CI logs.
        self.timings: dict[str, float] = {}

    # -- lifecycle ----------------------------------------------------------------------

    def start(self) -> None:
        """Create the cluster, start the server and create ``database``."""
        if self._tmp is not None:
            raise PgClusterError("cluster already started")
        bindir = self._bindir or find_bindir()
        if bindir is None:
            raise PgClusterError(f"no PostgreSQL server binaries under {PG_ROOT}/*/bin")
        self._bindir = bindir
        self.timings = {}
        began = time.monotonic()
        self._tmp = Path(tempfile.mkdtemp(prefix="capnote-pg-", dir=self._base_dir))
        # From here on a failure must not leave a server or a directory behind.
        atexit.register(self.stop)
        try:
            self._make_dirs()
            self._initdb()
            self._start_on_free_port()
            created = time.monotonic()
            self._client("createdb", "-T", "template0", self.database)
            self.timings["createdb"] = time.monotonic() - created
        except BaseException:
            self.stop()
            raise
        self.timings["total"] = time.monotonic() - began

    def stop(self) -> None:
        """Stop the server at once and delete every file of the cluster. Safe to repeat."""
        atexit.unregister(self.stop)
        if self._tmp is None:
            return
        try:
            if self._running:
                self._stop_server("immediate")
        finally:
            # A server that would not stop must not keep files open under a deleted tree.
            self._kill_postmaster()
            shutil.rmtree(self._tmp, ignore_errors=True)
            self._tmp = None
            self._port = None

    def restart(self, mode: StopMode = "fast") -> None:
        """Stop and start the server on the same port and socket, keeping the data.

        ``mode="immediate"`` is a crash as far as the server knows: the start runs crash
        recovery. With synchronous_commit=off a crash may lose the commits of the last
        fraction of a second, as a real one would; pass ``settings`` to keep it on where
        that matters. Open connections are cut either way, which is what fault tests want.
        """
        self._require_started()
        if self._running:
            self._stop_server(mode)
        self._start_server()

    def fresh_database(self, name: str) -> str:
        """Create an empty database (a copy of template0) and return its URL."""
        _check_database_name(name)
        self._require_started()
        self._client("createdb", "-T", "template0", name)
        return self.url_for(name)

    def __enter__(self) -> Self:
        self.start()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()

    # -- where it is ----------------------------------------------------------------------

    @property
    def running(self) -> bool:
        return self._running

    @property
    def port(self) -> int:
        self._require_started()
        assert self._port is not None
        return self._port

    @property
    def socket_dir(self) -> Path:
        return self._dir("sock")

    @property
    def data_dir(self) -> Path:
        return self._dir("data")

    @property
    def log_path(self) -> Path:
        return self._dir("postgres.log")

    @property
    def url(self) -> str:
        """SQLAlchemy URL of ``database`` over the unix socket."""
        return self.url_for(self.database)

    @property
    def tcp_url(self) -> str:
        """SQLAlchemy URL of ``database`` over TCP on 127.0.0.1."""
        return self.tcp_url_for(self.database)

    def url_for(self, database: str) -> str:
        query = urlencode({"host": str(self.socket_dir), "port": self.port}, safe="/")
        return f"postgresql+psycopg://{SUPERUSER}@/{quote(database)}?{query}"

    def tcp_url_for(self, database: str) -> str:
        return f"postgresql+psycopg://{SUPERUSER}@127.0.0.1:{self.port}/{quote(database)}"

    def conninfo(self, database: str | None = None) -> str:
        """libpq connection string over the socket, for ``psycopg.connect()``."""
        return (
            f"host={self.socket_dir} port={self.port} user={SUPERUSER} "
            f"dbname={database or self.database}"
        )

    def log_tail(self, lines: int = 30) -> str:
        """The end of the server log, for error messages."""
        try:
            text = self.log_path.read_text(errors="replace")
        except (OSError, PgClusterError):
            return ""
        return "\n".join(text.splitlines()[-lines:])

    # -- internals ------------------------------------------------------------------------

    def _dir(self, name: str) -> Path:
        self._require_started()
        assert self._tmp is not None
        return self._tmp / name

    def _require_started(self) -> None:
        if self._tmp is None:
            raise PgClusterError("cluster not started")

    @property
    def _as_root(self) -> bool:
        return os.geteuid() == 0

    def _make_dirs(self) -> None:
        assert self._tmp is not None
        self.socket_dir.mkdir(mode=0o700)
        if not self._as_root:
            return
        try:
            account = pwd.getpwnam(self._os_user)
        except KeyError:
            raise PgClusterError(
                f"running as root needs a {self._os_user!r} system user "
                "(the postgresql package creates it)"
            ) from None
        # initdb creates data/ itself and must own its parent; the server writes the log
        # and the socket. Root reaches them all the same, whoever owns them.
        for path in (self._tmp, self.socket_dir):
            os.chown(path, account.pw_uid, account.pw_gid)

    def _initdb(self) -> None:
        began = time.monotonic()
        self._server_program(
            "initdb",
            "-D",
            str(self.data_dir),
            "-A",
            "trust",
            "-U",
            SUPERUSER,
            "--no-sync",
            "-E",
            "UTF8",
            # C.UTF-8 is in every glibc since 2.35 (Debian 12): no locale to generate, byte
            # order collation, and still UTF-8 character classes (upper() of accented text).
            "--locale=C.UTF-8",
            timeout=INITDB_TIMEOUT,
        )
        self.timings["initdb"] = time.monotonic() - began

    def _write_config(self, port: int) -> None:
        settings = {
            "port": str(port),
            "listen_addresses": "'127.0.0.1'",
            "unix_socket_directories": _conf_string(str(self.socket_dir)),
            **SPEED_SETTINGS,
            **self._settings,
        }
        # Appending keeps the file's owner (postgres); later lines override earlier ones.
        with (self.data_dir / "postgresql.conf").open("a") as conf:
            conf.write("\n# capnote test cluster (tests/pg_cluster.py)\n")
            conf.writelines(f"{key} = {value}\n" for key, value in settings.items())

    def _start_on_free_port(self) -> None:
        began = time.monotonic()
        for attempt in range(1, START_ATTEMPTS + 1):
            self._port = _free_port()
            self._write_config(self._port)
            try:
                self._start_server()
                break
            except PgClusterError:
                lost_race = "already in use" in self.log_tail()
                if not lost_race or attempt == START_ATTEMPTS:
                    raise
        self.timings["start"] = time.monotonic() - began

    def _start_server(self) -> None:
        try:
            self._server_program(
                "pg_ctl",
                "start",
                "-w",
                "-t",
                str(PG_CTL_WAIT),
                "-D",
                str(self.data_dir),
                "-l",
                str(self.log_path),
                timeout=PG_CTL_TIMEOUT,
            )
        except PgClusterError:
            # pg_ctl may give up while the postmaster lives on; it must not outlive us.
            self._kill_postmaster()
            raise
        self._running = True

    def _stop_server(self, mode: StopMode) -> None:
        self._running = False
        self._server_program(
            "pg_ctl",
            "stop",
            "-w",
            "-t",
            str(PG_CTL_WAIT),
            "-m",
            mode,
            "-D",
            str(self.data_dir),
            timeout=PG_CTL_TIMEOUT,
        )

    def _kill_postmaster(self) -> None:
        # Last resort when pg_ctl failed: the postmaster's pid is the first line of
        # postmaster.pid. A file left by a dead server may name a pid now reused, so the
        # process is killed only if its command line names this cluster's data directory.
        # SIGKILL of the postmaster makes its backends exit as soon as they notice.
        if self._tmp is None:
            return
        data_dir = str(self._tmp / "data")
        with contextlib.suppress(OSError, ValueError, IndexError):
            pid = int((self._tmp / "data" / "postmaster.pid").read_text().splitlines()[0])
            argv = Path(f"/proc/{pid}/cmdline").read_bytes().decode(errors="replace")
            if data_dir in argv.split("\0"):
                os.kill(pid, signal.SIGKILL)

    def _server_program(self, program: str, *args: str, timeout: float) -> None:
        assert self._bindir is not None
        command = [str(self._bindir / program), *args]
        if self._as_root:
            command = [_runuser(), "-u", self._os_user, "--", *command]
        self._run(command, timeout)

    def _client(self, program: str, *args: str) -> None:
        assert self._bindir is not None
        connection = ["-h", str(self.socket_dir), "-p", str(self.port), "-U", SUPERUSER]
        self._run([str(self._bindir / program), *connection, *args], CLIENT_TIMEOUT)

    def _run(self, command: Sequence[str], timeout: float) -> None:
        assert self._tmp is not None
        # cwd: the postgres user could not enter the caller's directory (often /root) and
        # initdb warns about it. A new session lets a timeout kill runuser's whole group;
        # the postmaster is not in it (pg_ctl detaches it with setsid).
        with subprocess.Popen(
            command,
            cwd=self._tmp,
            env=_child_env(),
            stdin=subprocess.DEVNULL,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
            start_new_session=True,
        ) as proc:
            try:
                output, _ = proc.communicate(timeout=timeout)
            except subprocess.TimeoutExpired:
                with contextlib.suppress(ProcessLookupError):
                    os.killpg(proc.pid, signal.SIGKILL)
                with contextlib.suppress(subprocess.TimeoutExpired):
                    proc.communicate(timeout=5)
                raise PgClusterError(
                    f"{' '.join(command)} did not finish in {timeout:.0f} s\n{self.log_tail()}"
                ) from None
        if proc.returncode != 0:
            raise PgClusterError(
                f"{' '.join(command)} exited with {proc.returncode}:\n{output.strip()}\n"
                f"--- server log ---\n{self.log_tail()}"
            )


def _check_database_name(name: str) -> None:
    if not DATABASE_NAME.fullmatch(name):
        raise ValueError(f"database name {name!r} must match {DATABASE_NAME.pattern}")


def _conf_string(value: str) -> str:
    # postgresql.conf string literal: single quotes, an embedded quote doubled.
    return "'" + value.replace("'", "''") + "'"
