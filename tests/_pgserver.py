"""A throw-away PostgreSQL server on 127.0.0.1 in a temporary folder, for tests that need one.

Uses the machine's ``initdb`` and ``pg_ctl``; as root (which PostgreSQL refuses) it runs them as
the ``postgres`` (or ``nobody``) user through ``runuser``. :func:`start` returns None with the
reason when no server can be started, so the caller can skip saying why.
"""
from __future__ import annotations

import os
import pwd
import shutil
import socket
import subprocess
import tempfile
from pathlib import Path


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _as_user() -> tuple[list[str], int | None, int | None]:
    if os.geteuid() != 0:
        return [], None, None
    for name in ("postgres", "nobody"):
        try:
            pw = pwd.getpwnam(name)
        except KeyError:
            continue
        if shutil.which("runuser"):
            return ["runuser", "-u", name, "--"], pw.pw_uid, pw.pw_gid
    return [], None, None


class PgServer:
    def __init__(self, folder: Path, port: int, prefix: list[str]):
        self.folder, self.port, self.prefix = folder, port, prefix

    def url(self, db: str = "postgres") -> str:
        user = "waneguide"
        return f"postgresql+psycopg://{user}@127.0.0.1:{self.port}/{db}"

    def stop(self) -> None:
        subprocess.run([*self.prefix, "pg_ctl", "-D", str(self.folder / "data"), "-m", "immediate", "stop"],
                       capture_output=True, timeout=60)
        shutil.rmtree(self.folder, ignore_errors=True)


def start() -> tuple[PgServer | None, str]:
    """(server, "") or (None, reason). :meth:`PgServer.stop` stops it and removes its folder."""
    for tool in ("initdb", "pg_ctl"):
        if shutil.which(tool) is None:
            return None, f"PostgreSQL's {tool} is not installed"
    try:
        import psycopg  # noqa: F401
    except ImportError:
        return None, "the psycopg driver is not installed (pip install 'psycopg[binary]')"
    prefix, uid, gid = _as_user()
    if os.geteuid() == 0 and not prefix:
        return None, "running as root and no 'postgres' or 'nobody' user with runuser to run PostgreSQL as"
    # a fresh folder directly in the system temp dir, which the server user can reach
    folder = Path(tempfile.mkdtemp(prefix="waneguide-pg-"))
    if uid is not None:
        os.chown(folder, uid, gid)
    data = folder / "data"
    r = subprocess.run([*prefix, "initdb", "-D", str(data), "-U", "waneguide", "--auth=trust", "-E", "UTF8"],
                       capture_output=True, text=True, timeout=120)
    if r.returncode:
        return None, f"initdb failed: {r.stderr.strip()[-300:]}"
    port = _free_port()
    opts = f"-c listen_addresses=127.0.0.1 -p {port} -k {folder} -c fsync=off"
    r = subprocess.run([*prefix, "pg_ctl", "-D", str(data), "-o", opts, "-l", str(folder / "log"), "-w", "start"],
                       capture_output=True, text=True, timeout=120)
    if r.returncode:
        return None, f"pg_ctl start failed: {r.stderr.strip()[-300:]}"
    return PgServer(folder, port, prefix), ""
