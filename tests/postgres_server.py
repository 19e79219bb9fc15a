"""A throwaway PostgreSQL server for the database tests and benchmarks/db_read.py.

Debian's ``postgresql`` binaries (tests/setup.sh installs them); the cluster lives in a temporary
folder, runs as the ``postgres`` user when we are root (the server refuses to run as root), listens
on 127.0.0.1 on a free port with password authentication, and is stopped and removed on exit.
"""

from __future__ import annotations

import contextlib
import glob
import os
import shutil
import socket
import subprocess
import tempfile
from pathlib import Path

SUPER_PASSWORD = "super-Secret-2214"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _as_postgres(command: list[str]) -> list[str]:
    return ["runuser", "-u", "postgres", "--", *command] if os.geteuid() == 0 else command


@contextlib.contextmanager
def throwaway_server():
    """Yields (port, connect), connect(dbname) giving a superuser ADBC connection in autocommit
    mode."""
    bins = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"))
    if not bins:
        raise RuntimeError(
            "PostgreSQL is not installed: run tests/setup.sh (Debian's postgresql package)"
        )
    bin_dir = Path(bins[-1]).parent
    folder = Path(tempfile.mkdtemp(prefix="fairgauge-pg-"))
    folder.chmod(0o777)
    (folder / "pw").write_text(SUPER_PASSWORD + "\n")
    (folder / "pw").chmod(0o644)
    port = free_port()
    data = str(folder / "data")
    try:
        subprocess.run(
            _as_postgres(
                [
                    str(bin_dir / "initdb"),
                    "-D",
                    data,
                    "-U",
                    "postgres",
                    f"--pwfile={folder / 'pw'}",
                    "--auth-local=trust",
                    "--auth-host=scram-sha-256",
                    "-E",
                    "UTF8",
                    "--locale=C.UTF-8",
                ]
            ),
            check=True,
            capture_output=True,
            timeout=120,
        )
        subprocess.run(
            _as_postgres(
                [
                    str(bin_dir / "pg_ctl"),
                    "-D",
                    data,
                    "-l",
                    str(folder / "log"),
                    "-w",
                    "-o",
                    f"-p {port} -k {folder} -c listen_addresses=127.0.0.1",
                    "start",
                ]
            ),
            check=True,
            capture_output=True,
            timeout=120,
        )
        import adbc_driver_postgresql.dbapi as pg

        def connect(dbname: str = "postgres"):
            return pg.connect(
                f"host=127.0.0.1 port={port} dbname={dbname} user=postgres "
                f"password={SUPER_PASSWORD}",
                autocommit=True,
            )

        yield port, connect
    finally:
        subprocess.run(
            _as_postgres([str(bin_dir / "pg_ctl"), "-D", data, "-m", "fast", "-w", "stop"]),
            capture_output=True,
            timeout=120,
        )
        shutil.rmtree(folder, ignore_errors=True)
