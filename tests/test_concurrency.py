"""Races on first use: many processes opening one fresh history, two trainings into one store.

Issue 11: 5 of 6 concurrent `score` runs on a fresh SQLite history died with "database is
locked", PostgreSQL failed 5 of 10 trials with DuplicateTable, and two `train` runs into one
store lost a model. Here 8 processes do the same at once; every row must land exactly once.
"""
from __future__ import annotations

import multiprocessing as mp

import pytest

from tests import _pgserver
from waneguide.operations.history import History

N_PROCESSES = 8
ROWS_EACH = 25


def _writer(url: str, k: int, barrier) -> int:
    barrier.wait()  # all processes open the fresh database at the same moment
    h = History(url)
    rows = [{"content_hash": f"c{k}-{i}", "model_version": "v001", "model_id": "m1", "path_id": "P01"}
            for i in range(ROWS_EACH)]
    # every row twice: the second copy must be ignored, not double counted
    added = h.add_scores(rows) + h.add_scores(rows[:5])
    h.close()
    return added


def _hammer(url: str) -> list[int]:
    ctx = mp.get_context("spawn")
    with ctx.Manager() as manager:
        barrier = manager.Barrier(N_PROCESSES)
        with ctx.Pool(N_PROCESSES) as pool:
            return pool.starmap(_writer, [(url, k, barrier) for k in range(N_PROCESSES)], chunksize=1)


@pytest.mark.slow
def test_eight_processes_on_a_fresh_sqlite_history(tmp_path):
    url = f"sqlite:///{tmp_path / 'fresh.db'}"
    added = _hammer(url)
    # each process reports what the database did: its own rows once, the repeats never
    assert added == [ROWS_EACH] * N_PROCESSES
    assert History(url).count() == N_PROCESSES * ROWS_EACH


@pytest.fixture(scope="module")
def pg():
    server, why = _pgserver.start()
    if server is None:
        pytest.skip(f"no PostgreSQL server for this test: {why}")
    yield server
    server.stop()


@pytest.mark.slow
def test_eight_processes_on_a_fresh_postgresql_history(pg):
    url = pg.url()
    added = _hammer(url)
    assert added == [ROWS_EACH] * N_PROCESSES
    assert History(url).count() == N_PROCESSES * ROWS_EACH
