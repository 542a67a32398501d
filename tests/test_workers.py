"""Worker processes: results in order, the crash rule, and one job per step without a pool.

The jobs run in real spawned processes; the one that dies ends its own process with
os._exit, as a crash inside a library or the kernel's out-of-memory killer would.
"""
from __future__ import annotations

import os

from qcd.workers import DIED_TWICE, Jobs, imap


def square_or_die(x: int) -> int:
    """The job: x squared; a negative x ends its worker process on the spot."""
    if x < 0:
        os._exit(3)
    return x * x


def _drain(jobs: Jobs, n: int) -> dict:
    got: dict = {}
    while len(got) < n:
        jobs.wait(30.0)
        got.update(jobs.collect())
    return got


def _crash_log():
    """A list of (key, reason) and the on_crash that fills it, giving "crashed"."""
    crashed: list = []

    def on_crash(key, reason):
        crashed.append((key, reason))
        return "crashed"
    return crashed, on_crash


def test_results_come_back_in_the_order_asked_for():
    xs = list(range(12))
    assert list(imap(square_or_die, [(x,) for x in xs], 2)) == [x * x for x in xs]
    assert list(imap(square_or_die, [(x,) for x in xs], 1)) == [x * x for x in xs]


def test_a_job_whose_worker_dies_twice_gives_its_crash_result_and_the_pool_goes_on():
    crashed, on_crash = _crash_log()
    jobs = Jobs(square_or_die, 1, on_crash=on_crash)
    try:
        jobs.submit("bad", -1)
        assert _drain(jobs, 1) == {"bad": "crashed"}
        assert crashed == [("bad", DIED_TWICE)]          # tried once more, then given up
        jobs.submit("good", 7)                           # a new pool took over
        assert _drain(jobs, 1) == {"good": 49}
    finally:
        jobs.close()


def test_without_workers_one_job_runs_per_collect_in_submission_order():
    jobs = Jobs(square_or_die, 0)
    for x in (3, 1, 2):
        jobs.submit(f"k{x}", x)
    assert len(jobs) == 3
    assert jobs.collect() == [("k3", 9)]
    assert jobs.collect() == [("k1", 1)]
    assert jobs.collect() == [("k2", 4)] and len(jobs) == 0 and jobs.collect() == []


def test_a_batch_whose_worker_dies_gives_every_other_job_its_result_once():
    # the crash rule (qcd.workers.Jobs): every job of the batches in flight runs again alone;
    # only the one that kills its worker again gives the crash result
    crashed, on_crash = _crash_log()
    jobs = Jobs(square_or_die, 2, on_crash=on_crash)
    try:
        jobs.submit_many([(f"a{x}", (x,), {}) for x in (1, 2, -1, 3)])
        jobs.submit_many([(f"b{x}", (x,), {}) for x in (4, 5, 6)])
        assert len(jobs) == 7
        got: list = []
        while len(got) < 7:
            jobs.wait(30.0)
            got.extend(jobs.collect())
        keys = [k for k, _ in got]
        assert sorted(keys) == sorted(["a1", "a2", "a-1", "a3", "b4", "b5", "b6"])  # each once
        assert dict(got) == {"a1": 1, "a2": 4, "a-1": "crashed", "a3": 9, "b4": 16,
                             "b5": 25, "b6": 36}
        assert crashed == [("a-1", DIED_TWICE)] and len(jobs) == 0
        jobs.submit_many([("c", (7,), {}), ("d", (8,), {})])    # the pool goes on
        assert _drain(jobs, 2) == {"c": 49, "d": 64}
    finally:
        jobs.close()


def test_without_workers_a_batch_runs_one_job_per_collect():
    jobs = Jobs(square_or_die, 0)
    jobs.submit_many([("x", (2,), {}), ("y", (3,), {})])
    assert len(jobs) == 2
    assert jobs.collect() == [("x", 4)] and jobs.collect() == [("y", 9)] and len(jobs) == 0
