"""A throwaway PostgreSQL cluster for the tests: initdb in a temporary folder, the server on
a private unix socket (no TCP port), stopped and started again at will, removed at the end.

PostgreSQL refuses to run as root; as root the cluster belongs to an unprivileged user
(`postgres` when the system has one, else `nobody`) and every program runs as that user
through `setpriv`. When no PostgreSQL server binaries are installed, `start_cluster` raises
`ClusterUnavailable` with the reason, which the fixtures turn into a skip (CI installs them).
"""

from __future__ import annotations

import glob
import itertools
import os
import pwd
import shutil
import signal
import subprocess
import tempfile
import time
from pathlib import Path
from urllib.parse import quote


class ClusterUnavailable(Exception):
    pass


def _bindir() -> Path:
    found = shutil.which("pg_config")
    if found:
        out = subprocess.run([found, "--bindir"], capture_output=True, text=True).stdout.strip()
        if out and (Path(out) / "initdb").exists():
            return Path(out)
    candidates = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"), key=lambda p: int(p.split("/")[4]))
    if candidates:
        return Path(candidates[-1]).parent
    initdb = shutil.which("initdb")
    if initdb:
        return Path(initdb).parent
    raise ClusterUnavailable("no PostgreSQL server binaries (initdb, postgres); install Debian's postgresql package")


class Cluster:
    """One cluster; `url(schema)` names a database user, socket and search path."""

    USER = "vigil"
    DATABASE = "postgres"

    def __init__(self, bindir: Path, folder: Path, account: pwd.struct_passwd | None):
        self.bindir = bindir
        self.folder = folder
        self.data = folder / "data"
        self.socket_dir = folder / "socket"
        self.account = account
        self.process: subprocess.Popen | None = None
        self._schemas = itertools.count(1)

    # ------------------------------------------------------------ processes

    def _as_owner(self, argv: list[str]) -> list[str]:
        if self.account is None:
            return argv
        who = self.account
        return ["setpriv", f"--reuid={who.pw_uid}", f"--regid={who.pw_gid}", "--clear-groups", "--", *argv]

    def init(self) -> None:
        self.socket_dir.mkdir()
        if self.account is not None:
            for path in (self.folder, self.socket_dir):
                os.chown(path, self.account.pw_uid, self.account.pw_gid)
        argv = [str(self.bindir / "initdb"), "-D", str(self.data), "-U", self.USER, "-A", "trust"]
        argv += ["-E", "UTF8", "--locale=C", "--no-sync"]
        done = subprocess.run(self._as_owner(argv), capture_output=True, text=True, cwd=self.folder)
        if done.returncode != 0:
            raise ClusterUnavailable(f"initdb failed: {(done.stderr or done.stdout).strip().splitlines()[-1:]}")

    def start(self, timeout_s: float = 30.0) -> None:
        argv = [str(self.bindir / "postgres"), "-D", str(self.data), "-k", str(self.socket_dir)]
        argv += ["-c", "listen_addresses=", "-c", "fsync=off", "-c", "max_connections=60"]
        log = open(self.folder / "server.log", "ab")
        self.process = subprocess.Popen(self._as_owner(argv), stdout=log, stderr=subprocess.STDOUT, cwd=self.folder)
        log.close()
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                tail = (self.folder / "server.log").read_text(errors="replace").strip().splitlines()[-3:]
                raise ClusterUnavailable(f"postgres exited at start: {' / '.join(tail)}")
            if self.ready():
                return
            time.sleep(0.05)
        raise ClusterUnavailable("postgres did not accept connections within 30 s")

    def ready(self) -> bool:
        import psycopg

        try:
            psycopg.connect(self.url(), connect_timeout=2).close()
        except psycopg.Error:
            return False
        return True

    def stop(self) -> None:
        """Fast shutdown (SIGINT): clients are disconnected, the data stays."""
        if self.process is None:
            return
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGINT)
            try:
                self.process.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        self.process = None

    def remove(self) -> None:
        self.stop()
        shutil.rmtree(self.folder, ignore_errors=True)

    # ------------------------------------------------------------ addresses

    def url(self, schema: str | None = None) -> str:
        url = f"postgresql://{self.USER}@/{self.DATABASE}?host={quote(str(self.socket_dir), safe='')}"
        if schema is not None:
            url += f"&options={quote(f'-csearch_path={schema}', safe='')}"
        return url

    def fresh_schema(self, prefix: str = "t") -> str:
        """A URL whose tables go to a new, empty schema: a database of its own for one test."""
        import psycopg

        name = f"{prefix}{os.getpid()}_{next(self._schemas)}"
        with psycopg.connect(self.url(), autocommit=True) as conn:
            conn.execute(f"CREATE SCHEMA {name}")
        return self.url(name)


def start_cluster() -> Cluster:
    try:
        import psycopg  # noqa: F401
    except ImportError:
        raise ClusterUnavailable("psycopg is not installed (pip install -e '.[lab]')") from None
    bindir = _bindir()
    account = None
    if os.geteuid() == 0:
        if shutil.which("setpriv") is None:
            raise ClusterUnavailable("running as root and setpriv is missing: cannot start postgres unprivileged")
        for name in ("postgres", "nobody"):
            try:
                account = pwd.getpwnam(name)
                break
            except KeyError:
                continue
        if account is None:
            raise ClusterUnavailable("running as root with no unprivileged account for postgres")
    folder = Path(tempfile.mkdtemp(prefix="vigil-pg-"))
    cluster = Cluster(bindir, folder, account)
    try:
        cluster.init()
        cluster.start()
    except BaseException:
        cluster.remove()
        raise
    return cluster
