"""Storage back ends for the trials tests: the default journal file, SQLite, and a real,
throwaway PostgreSQL 15 server.

The server runs as the ``postgres`` user (PostgreSQL refuses to run as root), keeps its data
in a temporary folder, listens on 127.0.0.1 only, on a free port, requires a password for TCP
connections (given through ``PGPASSWORD``, as users are told to), and is stopped afterwards.
"""

from __future__ import annotations

import os
import secrets
import shutil
import socket
import subprocess
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest

from tests.conftest import TINY_SWEEP, write_sweep
from tests.trials.runs import EPOCHS

PG_USER = "postgres"


def as_postgres(cmd: list[str], **kw) -> subprocess.CompletedProcess:
    prefix = ["runuser", "-u", PG_USER, "--"] if os.geteuid() == 0 else []
    return subprocess.run(prefix + cmd, check=True, capture_output=True, text=True, **kw)


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


@contextmanager
def throwaway_postgres(max_connections: int = 200) -> Iterator[tuple[str, str]]:
    """(host URL without a database, password) of a fresh PostgreSQL cluster, stopped after.

    Also used by tests/bench/bench_load.py.
    """
    for binary in ("initdb", "pg_ctl", "postgres"):
        assert shutil.which(binary), f"{binary} is not on PATH: the PostgreSQL tests need it"
    root = Path(tempfile.mkdtemp(prefix="kablate-pg-"))
    password = secrets.token_hex(8)
    (root / "pw").write_text(password + "\n")
    if os.geteuid() == 0:
        shutil.chown(root, PG_USER)
        shutil.chown(root / "pw", PG_USER)
    data, port = root / "data", free_port()
    as_postgres(
        [
            "initdb",
            "-D",
            str(data),
            "-U",
            PG_USER,
            "--pwfile",
            str(root / "pw"),
            "--auth-host=scram-sha-256",
            "--auth-local=trust",
            "--no-sync",
        ]
    )
    options = (
        f"-c listen_addresses=127.0.0.1 -p {port} -k {root} -c fsync=off "
        f"-c synchronous_commit=off -c full_page_writes=off -c max_connections={max_connections}"
    )
    as_postgres(["pg_ctl", "-D", str(data), "-o", options, "-l", str(root / "log"), "-w", "start"])
    try:
        yield f"postgresql://{PG_USER}@127.0.0.1:{port}", password
    finally:
        as_postgres(["pg_ctl", "-D", str(data), "-m", "immediate", "-w", "stop"])
        shutil.rmtree(root, ignore_errors=True)


def create_database(host_url: str, password: str) -> str:
    """A fresh database on the server; its URL (the password is not in it)."""
    import psycopg2

    name = "t" + secrets.token_hex(6)
    conn = psycopg2.connect(host_url + "/postgres", password=password)
    conn.autocommit = True
    with conn.cursor() as cur:
        cur.execute(f"CREATE DATABASE {name}")
    conn.close()
    return f"{host_url}/{name}"


@pytest.fixture(scope="session")
def postgres_server():
    """(host URL without a database, password) of a fresh PostgreSQL cluster."""
    with throwaway_postgres() as server:
        yield server


@pytest.fixture
def postgres_url(postgres_server, monkeypatch) -> str:
    """A fresh database on the server; its password travels in ``PGPASSWORD`` only."""
    host_url, password = postgres_server
    monkeypatch.setenv("PGPASSWORD", password)
    return create_database(host_url, password)


@pytest.fixture(params=["journal", pytest.param("postgres", marks=pytest.mark.postgres)])
def storage(request, tmp_path) -> str | None:
    """Every storage a sweep can run on across processes: None is the default journal file."""
    if request.param == "journal":
        return None
    return request.getfixturevalue("postgres_url")


@pytest.fixture
def long_sweep(tmp_path: Path) -> Path:
    """The tiny sweep, made long enough (about 2 s a trial here) to be caught mid-trial.

    With 200 images an epoch takes about 10 ms, so a whole trial could start, checkpoint and
    finish between two looks of the test; 1,200 images and 40 epochs leave a wide window.
    """
    body = TINY_SWEEP.replace(
        'from = "configs/tiny-recipe.toml"', f'from = "configs/tiny-recipe.toml"\nepochs = {EPOCHS}'
    ).replace("train_size = 200", "train_size = 1200")
    return write_sweep(tmp_path, body)
