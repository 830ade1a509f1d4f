"""Real servers for the scale-out tests, started on loopback and stopped after: PostgreSQL 15 (Debian's
packages; `initdb` into a temporary folder as the `postgres` user, since PostgreSQL refuses to run as
root) and an S3 server speaking the real protocol (moto's server mode). `.ci/run` installs both, so
the tests never skip on CI; elsewhere a missing PostgreSQL skips them with the reason."""
from __future__ import annotations

import os
import shutil
import socket
import subprocess
import tempfile
import time
from contextlib import contextmanager
from pathlib import Path

PG_BIN = Path("/usr/lib/postgresql/15/bin")


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _as_postgres(args: list[str], **kw) -> subprocess.CompletedProcess:
    if os.geteuid() == 0:  # PostgreSQL will not run as root
        args = ["runuser", "-u", "postgres", "--", *args]
    return subprocess.run(args, check=True, capture_output=True, text=True, **kw)


def postgres_missing() -> str | None:
    """Why PostgreSQL cannot be started here, or None."""
    if not (PG_BIN / "initdb").is_file():
        return f"PostgreSQL 15 is not installed ({PG_BIN}/initdb missing; .ci/run installs it)"
    return None


@contextmanager
def postgres():
    """A throwaway PostgreSQL cluster on 127.0.0.1; yields a database URL (trust auth, loopback only)."""
    folder = Path(tempfile.mkdtemp(prefix="geotween-pg-"))
    data, port = folder / "data", free_port()
    if os.geteuid() == 0:
        shutil.chown(folder, "postgres")
    _as_postgres([str(PG_BIN / "initdb"), "-D", str(data), "-U", "postgres", "--auth=trust", "-E", "UTF8"])
    _as_postgres([str(PG_BIN / "pg_ctl"), "-D", str(data), "-l", str(folder / "log"), "-w", "-t", "60", "-o",
                  f"-c listen_addresses=127.0.0.1 -p {port} -c unix_socket_directories={folder} "
                  f"-c fsync=off -c max_connections=200", "start"])
    try:
        yield f"postgresql://postgres@127.0.0.1:{port}/postgres"
    finally:
        _as_postgres([str(PG_BIN / "pg_ctl"), "-D", str(data), "-m", "immediate", "stop"])
        shutil.rmtree(folder, ignore_errors=True)


def fresh_database(url: str, name: str) -> str:
    """Create database `name` on the server of `url`; returns its URL."""
    import psycopg

    with psycopg.connect(url, autocommit=True) as con:
        con.execute(f'DROP DATABASE IF EXISTS "{name}"')
        con.execute(f'CREATE DATABASE "{name}"')
    return url.rsplit("/", 1)[0] + "/" + name


@contextmanager
def s3_server():
    """moto's S3 server on 127.0.0.1 with one bucket; yields (endpoint URL, bucket). The credentials
    are moto's test ones, set in the environment for the code under test."""
    import boto3
    from moto.server import ThreadedMotoServer

    port = free_port()
    server = ThreadedMotoServer(ip_address="127.0.0.1", port=port, verbose=False)
    server.start()
    endpoint = f"http://127.0.0.1:{port}"
    old = {k: os.environ.get(k) for k in ("AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY", "AWS_DEFAULT_REGION")}
    os.environ.update(AWS_ACCESS_KEY_ID="testing", AWS_SECRET_ACCESS_KEY="testing", AWS_DEFAULT_REGION="us-east-1")
    try:
        deadline = time.monotonic() + 20
        while True:
            try:
                boto3.client("s3", endpoint_url=endpoint).create_bucket(Bucket="geotween")
                break
            except Exception:
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.1)
        yield endpoint, "geotween"
    finally:
        server.stop()
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
