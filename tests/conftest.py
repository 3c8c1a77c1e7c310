"""Shared test helpers: paths to the public benchmark files and small random models."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def _find_benchmarks() -> Path:
    for base in (ROOT.parent / "shared" / "benchmarks", ROOT / ".." / "shared" / "benchmarks"):
        if base.is_dir():
            return base.resolve()
    return ROOT.parent / "shared" / "benchmarks"


BENCHMARKS = _find_benchmarks()


@pytest.fixture(scope="session")
def benchmarks() -> Path:
    if not BENCHMARKS.is_dir():
        pytest.fail(f"public benchmark files not found at {BENCHMARKS}")
    return BENCHMARKS


def rpc_error(call):
    """The grpc.RpcError that ``call()`` raises (fails the test when it raises none)."""
    import grpc

    with pytest.raises(grpc.RpcError) as e:
        call()
    return e.value


@pytest.fixture(scope="session")
def postgres():
    """A real PostgreSQL server for the session (tests/pg_server.py); fails when
    PostgreSQL is not installed (``make test`` installs it)."""
    from pg_server import PostgresServer

    server = PostgresServer().start()
    try:
        yield server
    finally:
        server.stop()


@pytest.fixture(scope="module")
def cluster():
    """A local Dask cluster (2 single-threaded worker processes on loopback), one per test
    module that asks for it."""
    pytest.importorskip("distributed")
    from flipfix.service.cluster import connect

    c = connect("local:2")
    try:
        yield c
    finally:
        c.close()
