"""The registry's index in PostgreSQL (shared by replicas): pooled connections through SQLAlchemy's
pool, the tables in schema `geotween`, and the SQLite-style '?' placeholders the registry writes."""
from __future__ import annotations

import contextlib
from typing import Iterator

SCHEMA = "geotween"


class PgConnection:
    """A pooled psycopg connection that takes the registry's '?' placeholders."""

    def __init__(self, raw):
        self.raw = raw

    def execute(self, sql: str, params: tuple = ()):
        cur = self.raw.cursor()
        cur.execute(sql.replace("?", "%s"), tuple(params))
        return cur

    def commit(self) -> None:
        self.raw.commit()


class PgIndex:
    def __init__(self, url: str, *, timeout_s: float = 10.0):
        import sqlalchemy

        url = sqlalchemy.make_url(url).set(drivername="postgresql+psycopg")
        self.engine = sqlalchemy.create_engine(url, pool_size=4, max_overflow=4, pool_pre_ping=True,
                                               connect_args={"options": f"-c search_path={SCHEMA}",
                                                             "connect_timeout": int(timeout_s)})

    @contextlib.contextmanager
    def connect(self, *, write: bool, schema: bool, error: type[Exception],
                passing: tuple[type[Exception], ...] = ()) -> Iterator[PgConnection]:
        """A transaction, committed when the block ends; `write` queues behind other writers on the
        generation row (as SQLite's writers do on its lock), `schema` creates the schema first. The
        driver's errors come out as `error`; `passing` ones as they are."""
        try:
            raw = self.engine.raw_connection()
        except Exception as exc:  # the driver's own errors (psycopg), or the pool's
            raise error(f"cannot open the registry index in PostgreSQL: {type(exc).__name__}: "
                        f"{str(exc).splitlines()[0] if str(exc) else ''}") from None
        con = PgConnection(raw)
        try:
            if schema:  # one replica creates the tables; the others wait for it
                con.execute("SELECT pg_advisory_xact_lock(7262331)")
                con.execute(f"CREATE SCHEMA IF NOT EXISTS {SCHEMA}")
            if write:
                con.execute("SELECT value FROM meta WHERE key = 'generation' FOR UPDATE")
            yield con
            raw.commit()
        except BaseException as exc:
            with contextlib.suppress(Exception):
                raw.rollback()
            if isinstance(exc, passing) or not isinstance(exc, Exception):
                raise
            if type(exc).__module__.startswith("psycopg"):
                raise error(f"registry index (PostgreSQL): {exc}") from exc
            raise
        finally:
            raw.close()  # back to the pool
