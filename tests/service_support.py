"""Fixtures shared by the service tests (store, Redis, stack); imported by those test files
(``from service_support import store``).

Not a conftest.py: other test files do not need them, and importing them explicitly keeps
the service's fixtures next to the tests that use them.
"""

from __future__ import annotations

import os
import uuid

import pytest

#: the PostgreSQL server the catalog tests may create and drop schemas in: only one named on
#: purpose (``.ci/run`` names CI's own local server), never whatever happens to answer
POSTGRES_URL = os.environ.get("CLOSURE_TEST_POSTGRES_URL", "")


def postgres_reason() -> str | None:
    """None when the test PostgreSQL answers, else why it is skipped."""
    if not POSTGRES_URL:
        return ("CLOSURE_TEST_POSTGRES_URL is not set: name a PostgreSQL server the tests may "
                "create and drop schemas in, e.g. postgresql+psycopg://postgres@127.0.0.1:5432/test")
    try:
        import sqlalchemy as sa

        engine = sa.create_engine(POSTGRES_URL, connect_args={"connect_timeout": 3})
        with engine.connect() as conn:
            conn.execute(sa.text("SELECT 1"))
        engine.dispose()
    except Exception as exc:  # noqa: BLE001 - any failure means: skip with the reason
        return f"no PostgreSQL at {POSTGRES_URL} ({type(exc).__name__}: {exc})"[:300]
    return None


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def store(request, tmp_path):
    """A Store on SQLite, and on PostgreSQL in a schema of its own (dropped after)."""
    from closure.store import Store

    if request.param == "sqlite":
        st = Store(tmp_path / "store")
        yield st
        st.close()
        return
    reason = postgres_reason()
    if reason:
        pytest.skip(reason)
    schema = f"closure_test_{uuid.uuid4().hex[:12]}"
    st = Store(tmp_path / "store", POSTGRES_URL, schema=schema)
    try:
        yield st
    finally:
        st.drop_schema()
        st.close()


@pytest.fixture
def redis_server(tmp_path_factory):
    """A redis-server of our own (bundled binary, unix socket in a fresh folder, append-only
    persistence); never the system one on 6379. Yields the RedisServer; stopped after."""
    from closure.localstack import RedisServer

    server = RedisServer(tmp_path_factory.mktemp("redis"))
    server.start()
    try:
        yield server
    finally:
        server.stop()


@pytest.fixture(scope="session")
def turb2d_file(tmp_path_factory):
    """A small 2-D turbulence file from closure.synth (32 x 32, 6 snapshots)."""
    from closure.synth import turb2d, write

    folder = tmp_path_factory.mktemp("data")
    return write(turb2d(n=32, snapshots=6, spinup=1.0, interval=0.2), folder / "turb2d.nc")


def child_pids(pid: int) -> list[int]:
    """Live child processes of ``pid`` (from /proc; Linux)."""
    out = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat") as fh:
                fields = fh.read().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[1]) == pid and fields[0] != "Z":
            out.append(int(entry))
    return out


def pid_alive(pid: int) -> bool:
    """Whether ``pid`` is a running (not zombie) process."""
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False
