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


def test_results_come_back_in_the_order_asked_for():
    xs = list(range(12))
    assert list(imap(square_or_die, [(x,) for x in xs], 2)) == [x * x for x in xs]
    assert list(imap(square_or_die, [(x,) for x in xs], 1)) == [x * x for x in xs]


def test_a_job_whose_worker_dies_twice_gives_its_crash_result_and_the_pool_goes_on():
    crashed = []

    def on_crash(key, reason):
        crashed.append((key, reason))
        return "crashed"
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
