"""A throw-away PostgreSQL server for the tests (issue 17: a real server, not a stand-in).

``PgServer.start()`` runs the system's ``initdb`` into a fresh temporary directory (password
authentication, scram-sha-256, a random password), starts ``postgres`` with ``pg_ctl`` on the
loopback interface at a free port with its unix socket in that directory, and ``stop()`` stops it
and removes the directory. As root (CI runs as root; initdb and postgres refuse to), both run as
an unprivileged user through ``runuser``: ``OPTGRADE_PG_USER``, else ``postgres`` if that user
exists, else ``nobody``.

The server binaries are looked up in ``OPTGRADE_PG_BIN`` (set by .ci/run), then
``/usr/lib/postgresql/<highest version>/bin`` (Debian's layout), then ``PATH``.
"""

from __future__ import annotations

import contextlib
import os
import pwd
import secrets
import shutil
import socket
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

__all__ = ["PgServer", "PgUnavailable", "find_bin"]


class PgUnavailable(RuntimeError):
    """No PostgreSQL server could be started here (binaries, user or start-up failed)."""


def find_bin(name: str) -> str:
    """Path of a PostgreSQL server program (``initdb``, ``pg_ctl``, ``postgres``)."""
    env = os.environ.get("OPTGRADE_PG_BIN")
    dirs = [Path(env)] if env else []
    root = Path("/usr/lib/postgresql")
    if root.is_dir():
        versions = sorted((p for p in root.iterdir() if p.name.isdigit()),
                          key=lambda p: int(p.name), reverse=True)
        dirs += [v / "bin" for v in versions]
    for d in dirs:
        if (d / name).is_file():
            return str(d / name)
    found = shutil.which(name)
    if found:
        return found
    raise PgUnavailable(f"PostgreSQL program {name!r} not found (OPTGRADE_PG_BIN, "
                        "/usr/lib/postgresql/*/bin, PATH); install the postgresql package")


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _run_as() -> tuple[list[str], int | None, int | None]:
    """Command prefix, uid and gid for running the server (unprivileged when we are root)."""
    if os.geteuid() != 0:
        return [], None, None
    for name in filter(None, (os.environ.get("OPTGRADE_PG_USER"), "postgres", "nobody")):
        try:
            entry = pwd.getpwnam(name)
        except KeyError:
            continue
        runuser = shutil.which("runuser")
        if runuser:
            return [runuser, "-u", name, "--"], entry.pw_uid, entry.pw_gid
        su = shutil.which("su")
        if su:  # su -c takes one shell string: the caller quotes
            return [su, "-s", "/bin/sh", name, "-c"], entry.pw_uid, entry.pw_gid
    raise PgUnavailable("running as root and no unprivileged user (postgres, nobody) with "
                        "runuser or su to run the server")


@dataclass
class PgServer:
    """A running throw-away server; ``url(db)`` gives a ``postgresql://`` URL."""

    base: Path
    port: int
    user: str
    password: str
    prefix: list[str]
    log: Path

    @classmethod
    def start(cls, *, fsync: bool = False) -> PgServer:
        """initdb + pg_ctl start; ``fsync=False`` (tests) trades crash safety of the throw-away
        server for speed; benchmarks pass True."""
        initdb, pg_ctl = find_bin("initdb"), find_bin("pg_ctl")
        prefix, uid, gid = _run_as()
        base = Path(tempfile.mkdtemp(prefix="optgrade-pg-"))
        try:
            password = secrets.token_hex(12)
            pwfile = base / "pw"
            pwfile.write_text(password + "\n")
            os.chmod(pwfile, 0o600)
            if uid is not None:
                os.chown(base, uid, gid)
                os.chown(pwfile, uid, gid)
            cls._call(prefix, [initdb, "-D", str(base / "data"), "-U", "optgrade",
                               f"--pwfile={pwfile}", "-A", "scram-sha-256", "-E", "UTF8",
                               "--no-sync", "--no-instructions"], timeout=120)
            pwfile.unlink()
            log = base / "server.log"
            last = ""
            for _attempt in range(3):  # a free port can be taken between probe and start
                port = _free_port()
                opts = (f"-p {port} -k {base} -c listen_addresses=127.0.0.1 "
                        f"-c fsync={'on' if fsync else 'off'} -c max_connections=60")
                try:
                    cls._call(prefix, [pg_ctl, "-D", str(base / "data"), "-l", str(log), "-w",
                                       "-t", "60", "-o", opts, "start"], timeout=90)
                    return cls(base, port, "optgrade", password, prefix, log)
                except PgUnavailable as exc:
                    last = str(exc)
            raise PgUnavailable(f"postgres did not start: {last}")
        except BaseException:
            shutil.rmtree(base, ignore_errors=True)
            raise

    @staticmethod
    def _call(prefix: list[str], cmd: list[str], timeout: float) -> None:
        if prefix and prefix[-1] == "-c":  # su: one quoted shell command
            import shlex

            cmd = [shlex.join(cmd)]
        try:
            proc = subprocess.run(prefix + cmd, capture_output=True, text=True,
                                  timeout=timeout, stdin=subprocess.DEVNULL)
        except (OSError, subprocess.TimeoutExpired) as exc:
            raise PgUnavailable(f"{Path(cmd[0]).name}: {exc}") from None
        if proc.returncode != 0:
            raise PgUnavailable(f"{' '.join(cmd[:2])} exit {proc.returncode}: "
                                f"{(proc.stderr or proc.stdout)[-800:]}")

    def url(self, database: str = "postgres", *, password: str | None = None,
            driver: str = "") -> str:
        """``postgresql[+driver]://optgrade:PASSWORD@127.0.0.1:PORT/DATABASE``."""
        scheme = f"postgresql+{driver}" if driver else "postgresql"
        pw = self.password if password is None else password
        return f"{scheme}://{self.user}:{pw}@127.0.0.1:{self.port}/{database}"

    def create_database(self, name: str) -> str:
        """A new empty database; returns its URL."""
        import psycopg

        with contextlib.closing(psycopg.connect(host="127.0.0.1", port=self.port,
                                                user=self.user, password=self.password,
                                                dbname="postgres", autocommit=True)) as conn:
            conn.execute(f'CREATE DATABASE "{name}"')
        return self.url(name)

    def stop(self) -> None:
        """Stop the server (fast shutdown) and remove its directory."""
        try:
            self._call(self.prefix, [find_bin("pg_ctl"), "-D", str(self.base / "data"), "-m",
                                     "fast", "-w", "stop"], timeout=60)
        finally:
            shutil.rmtree(self.base, ignore_errors=True)
