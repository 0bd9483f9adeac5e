"""The one task runner (waneguide.core.runner): serial, joblib and Dask give the same results."""
from __future__ import annotations

import numpy as np
import pytest
from dask.distributed import Client, LocalCluster

import waneguide.core.runner as runner_mod
from waneguide.core.errors import InputError
from waneguide.core.runner import check_n_jobs, check_scheduler, run_tasks


def _task(seed, n, *, offset):
    """Depends on its own arguments and the shared object only (any worker gives the same bytes)."""
    rng = np.random.default_rng(seed)
    return rng.standard_normal(n) + offset


def _fails(i):
    if i == 3:
        raise ArithmeticError(f"task {i} failed")
    return i


TASKS = {f"t{i}": (100 + i, 5 + i) for i in range(7)}
SHARED = {"offset": np.array([0.25])}  # an array travels as a shared object


def _expected():
    # computed directly with numpy's generator: the outside reference for every backend
    return {k: np.random.default_rng(s).standard_normal(n) + SHARED["offset"] for k, (s, n) in TASKS.items()}


def _collect(**kw):
    got = {}
    for key, value in run_tasks(_task, TASKS, shared=SHARED, **kw):
        assert key not in got  # every task is reported once
        got[key] = value
    return got


def _same(got, expected):
    assert set(got) == set(expected)
    for k in expected:
        np.testing.assert_array_equal(got[k], expected[k])


def test_serial_and_joblib_give_the_same_results():
    expected = _expected()
    _same(_collect(n_jobs=1), expected)
    _same(_collect(n_jobs=2), expected)
    _same(_collect(n_jobs=2, prefer="threads"), expected)


def test_dask_client_and_address_give_the_same_results():
    expected = _expected()
    with LocalCluster(host="127.0.0.1", protocol="tcp://", n_workers=1, threads_per_worker=2, processes=False,
                      dashboard_address=None) as cluster, Client(cluster, set_as_default=False) as client:
        _same(_collect(scheduler=client), expected)
        _same(_collect(scheduler=cluster.scheduler_address), expected)
        assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")
        assert client.status == "running"  # a client passed in is left open for its owner


def test_dask_window_is_bounded(monkeypatch):
    # the runner's stated window (module docstring): at most two tasks per worker thread in
    # flight, so 2 threads -> 4 submitted before the first result
    submitted = []
    real_submit = Client.submit

    def counting(self, *a, **k):
        submitted.append(len(submitted))
        return real_submit(self, *a, **k)

    many = {i: (i, 3) for i in range(12)}
    with LocalCluster(host="127.0.0.1", protocol="tcp://", n_workers=1, threads_per_worker=2, processes=False,
                      dashboard_address=None) as cluster, Client(cluster, set_as_default=False) as client:
        monkeypatch.setattr(Client, "submit", counting)
        it = run_tasks(_task, many, scheduler=client, shared={"offset": 0.0})
        next(it)
        assert len(submitted) <= 5  # the first window of 4, plus the one refill after the first result
        rest = dict(it)
    assert len(rest) == 11 and len(submitted) == 12


def test_progress_bar_advances_by_weight(monkeypatch):
    bars = []

    class Recorder:
        def __init__(self, **kw):
            self.kw, self.steps = kw, []
            bars.append(self)

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            return False

        def update(self, n):
            self.steps.append(n)

    monkeypatch.setattr(runner_mod, "tqdm", Recorder)
    got = dict(run_tasks(_fails, {i: (i,) for i in (0, 1, 2)}, progress=True, desc="demo", unit="case",
                         weight=lambda k: 10 * (k + 1), initial=5))
    assert got == {0: 0, 1: 1, 2: 2}
    (bar,) = bars
    # 5 done before, then the tasks' weights 10 + 20 + 30
    assert bar.kw["total"] == 65 and bar.kw["initial"] == 5 and bar.kw["disable"] is False
    assert bar.kw["desc"] == "demo" and bar.kw["unit"] == "case"
    assert sorted(bar.steps) == [10, 20, 30]
    dict(run_tasks(_fails, {0: (0,)}))
    assert bars[-1].kw["disable"] is True  # progress defaults to off


@pytest.mark.parametrize("n_jobs", [1, 2])
def test_task_exceptions_propagate(n_jobs):
    with pytest.raises(ArithmeticError, match="task 3 failed"):
        dict(run_tasks(_fails, {i: (i,) for i in range(6)}, n_jobs=n_jobs))


def test_task_exception_propagates_from_dask():
    with LocalCluster(host="127.0.0.1", protocol="tcp://", n_workers=1, threads_per_worker=2, processes=False,
                      dashboard_address=None) as cluster, Client(cluster, set_as_default=False) as client:
        with pytest.raises(ArithmeticError, match="task 3 failed"):
            dict(run_tasks(_fails, {i: (i,) for i in range(6)}, scheduler=client))


def test_serial_run_is_lazy():
    # task i + 1 starts only when the caller asks for it, so results handled before an error are kept
    seen = []
    it = run_tasks(lambda i: seen.append(i) or i, {i: (i,) for i in range(4)})
    assert seen == []
    next(it)
    assert seen == [0]


@pytest.mark.parametrize("bad", [0, -2, 1.5, "2", True, None])
def test_bad_n_jobs_is_refused_naming_the_option(bad):
    with pytest.raises(InputError, match=r"--jobs must be a positive whole number.*got"):
        run_tasks(_fails, {0: (0,)}, n_jobs=bad)
    with pytest.raises(InputError, match=r"--workers must be"):
        check_n_jobs(bad, option="--workers")


def test_good_n_jobs_pass():
    assert check_n_jobs(np.int64(3)) == 3 and check_n_jobs(-1) == -1


@pytest.mark.parametrize("bad", ["127.0.0.1:8786", "http://h:8786", 8786])
def test_bad_scheduler_is_refused_naming_the_option(bad):
    with pytest.raises(InputError, match=r"--scheduler must be a Dask scheduler address.*drop --scheduler"):
        check_scheduler(bad)


def test_unreachable_scheduler_says_start_it_or_drop_the_option(monkeypatch):
    monkeypatch.setattr(runner_mod, "CONNECT_TIMEOUT", "1s")
    with pytest.raises(InputError, match=r"could not reach the Dask scheduler at tcp://127.0.0.1:9.*start it.*"
                                         r"drop --scheduler"):
        dict(run_tasks(_fails, {0: (0,)}, scheduler="tcp://127.0.0.1:9"))
