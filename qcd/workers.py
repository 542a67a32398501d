"""Worker processes: a spawned pool whose workers leave with their parent, and the crash rule.

Shared by the service (``Jobs``: submit now, collect later), ``qcd scan --workers`` and
``scan --store`` (``imap``: results in the order asked for) and the demo's file writer.

The crash rule: a worker that dies (killed, out of memory, a crash inside a library) takes
every job in flight with it, each job of a batch included. Those jobs run again in a new
pool, one at a time and alone, so a job whose worker dies again is the one to blame; it, or
a job whose result could not be handed back, gives ``on_crash(key, reason)`` instead of a
result, so one bad file never stops the others (``Jobs``). Exceptions inside a job are the job
function's business (``pipeline.measure`` never raises). Imports nothing from qcd.
"""
from __future__ import annotations

import logging
import os
import signal
import sys
import threading
import time
from collections import deque
from dataclasses import dataclass
from typing import Any, Callable, Iterable, Iterator

from qcd.lazy import Later

cf = Later("concurrent.futures")   # imap with one worker never needs the pool's modules
multiprocessing = Later("multiprocessing")

__all__ = ["Jobs", "imap", "default_workers", "pid_alive", "DIED_TWICE"]

log = logging.getLogger("qcd.workers")

DIED_TWICE = "the measuring process died twice on this file"


def default_workers() -> int:
    """Worker processes for this machine: the number of cores, at most 4."""
    return max(1, min(os.cpu_count() or 1, 4))


def pid_alive(pid: int) -> bool:
    """True while process ``pid`` exists on this machine."""
    if pid <= 0:
        return False
    if sys.platform == "win32":
        import ctypes
        h = ctypes.windll.kernel32.OpenProcess(0x1000, False, pid)  # QUERY_LIMITED_INFORMATION
        if not h:
            return False
        ctypes.windll.kernel32.CloseHandle(h)
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _new_pool(workers: int) -> cf.ProcessPoolExecutor:
    # spawn: fork with observer threads running is unsafe (and warns on 3.12+), and spawned
    # workers are our own children, which _watch_parent ends when the parent is killed
    return cf.ProcessPoolExecutor(max_workers=workers,
                                  mp_context=multiprocessing.get_context("spawn"),
                                  initializer=_watch_parent, initargs=(os.getpid(),))


# One worker per core: its numerical libraries get one thread each (set before numpy loads;
# a value the user set is kept). Measured: several BLAS threads per worker cost a third more
# CPU for the same files and were slower, even with one worker.
_ONE_THREAD = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def _watch_parent(pid: int) -> None:
    """In a worker: one numerical thread, and exit when the parent process is gone (kill -9
    leaves no one to stop us)."""
    for name in _ONE_THREAD:
        os.environ.setdefault(name, "1")
    # Ctrl-C reaches the whole process group: the parent decides, workers carry on quietly
    signal.signal(signal.SIGINT, signal.SIG_IGN)

    def watch() -> None:
        while pid_alive(pid):
            time.sleep(1.0)
        os._exit(0)
    threading.Thread(target=watch, name="qcd-parent-watch", daemon=True).start()


@dataclass
class _Job:
    key: Any
    args: tuple
    kwargs: dict
    crashes: int = 0


def _run_all(fn: Callable[..., Any], calls: list[tuple[tuple, dict]]) -> list[Any]:
    """In a worker: ``fn`` for each (args, kwargs) of a batch, results in the same order."""
    return [fn(*args, **kwargs) for args, kwargs in calls]


class Jobs:
    """``fn(*args, **kwargs)`` for each submitted job, in ``workers`` spawned processes.

    ``submit`` hands one job to a worker; ``submit_many`` hands several to one worker as one
    batch (one trip through the pool's queues for all of them). ``workers=0`` runs the jobs
    in this process, one per ``collect()`` call, in the order submitted. ``collect()`` returns
    ``[(key, result)]`` of the jobs finished so far; ``on_crash(key, reason)`` gives the result
    of a job the crash rule ends (None: raise). ``len()`` counts jobs, not batches.

    The crash rule for batches: when a worker dies, every job in flight (each member of each
    batch) is a suspect. Suspects run again one at a time, alone in the pool (other jobs wait
    meanwhile), so the one whose worker dies again is known: it gives
    ``on_crash(key, DIED_TWICE)``, and every other suspect gives its own result. A job's result
    is handed back only with its whole batch's, so none is ever given twice.
    """

    def __init__(self, fn: Callable[..., Any], workers: int, *,
                 on_crash: Callable[[Any, str], Any] | None = None) -> None:
        self.fn, self.workers, self.on_crash = fn, max(0, int(workers)), on_crash
        self._pool: cf.ProcessPoolExecutor | None = None
        self._running: dict[cf.Future, list[_Job]] = {}
        self._inline: list[_Job] = []
        self._suspects: deque[_Job] = deque()    # in flight when a worker died: run alone
        self._alone = False                     # a suspect is running, nothing else
        self._held: deque[list[_Job]] = deque()  # submitted while suspects are tried

    def __len__(self) -> int:
        return (sum(len(m) for m in self._running.values()) + len(self._inline)
                + len(self._suspects) + sum(len(m) for m in self._held))

    def submit(self, key: Any, *args: Any, **kwargs: Any) -> None:
        self.submit_many([(key, args, kwargs)])

    def submit_many(self, jobs: Iterable[tuple[Any, tuple, dict]]) -> None:
        """One batch of ``(key, args, kwargs)`` jobs, run one after another by one worker."""
        members = [_Job(key, tuple(args), dict(kwargs)) for key, args, kwargs in jobs]
        if not members:
            return
        if self.workers == 0:
            self._inline.extend(members)
        elif self._suspects or self._alone:
            self._held.append(members)
        else:
            self._start(members)

    def _start(self, members: list[_Job]) -> None:
        if self._pool is None:
            self._pool = _new_pool(self.workers)
        calls = [(j.args, j.kwargs) for j in members]
        try:
            fut = self._pool.submit(_run_all, self.fn, calls)
        except cf.process.BrokenProcessPool:  # a worker died since the last collect()
            if self._running:                 # which tells its jobs; these wait for it
                self._held.append(members)
                return
            log.error("a worker process died; starting new ones")
            self._pool.shutdown(wait=False, cancel_futures=True)
            self._pool = _new_pool(self.workers)
            fut = self._pool.submit(_run_all, self.fn, calls)
        self._running[fut] = members

    def _pump(self) -> None:
        """Start what waits: the next suspect alone, else every held batch."""
        if self._alone:
            return
        if self._suspects:
            if not self._running:
                self._alone = True
                self._start([self._suspects.popleft()])
            return
        held, self._held = self._held, deque()
        for members in held:
            self._start(members)

    def collect(self) -> list[tuple[Any, Any]]:
        """The finished jobs as ``(key, result)``; crashed ones run again (see the class)."""
        if self._inline:
            job = self._inline.pop(0)
            return [(job.key, self.fn(*job.args, **job.kwargs))]
        out: list[tuple[Any, Any]] = []
        broken = False
        for fut in [f for f in self._running if f.done()]:
            members = self._running.pop(fut)
            if len(members) == 1:
                self._alone = False
            try:
                out.extend(zip((j.key for j in members), fut.result()))
            except cf.process.BrokenProcessPool:
                broken = True
                self._died(members, out)
            except Exception as e:            # the results could not be handed back
                if len(members) > 1:          # which one's? each of them again, alone
                    self._held.extendleft([j] for j in reversed(members))
                else:
                    out.append((members[0].key, self._crashed(
                        members[0],
                        f"the measuring process could not return its result ({e!r})")))
        if broken:
            self._restart(out)
        self._pump()
        return out

    def _died(self, members: list[_Job], out: list[tuple[Any, Any]]) -> None:
        for job in members:
            job.crashes += 1
            if job.crashes >= 2:
                out.append((job.key, self._crashed(job, DIED_TWICE)))
            else:
                self._suspects.append(job)

    def _crashed(self, job: _Job, reason: str) -> Any:
        if self.on_crash is None:
            raise RuntimeError(f"job {job.key!r}: {reason}")
        return self.on_crash(job.key, reason)

    def _restart(self, out: list[tuple[Any, Any]]) -> None:
        """A new pool; every job still in flight in the old one is a suspect as well."""
        log.error("a worker process died; starting new ones")
        old, self._pool = self._pool, None
        in_flight = list(self._running.values())
        self._running.clear()
        self._alone = False
        if old is not None:
            old.shutdown(wait=False, cancel_futures=True)
        for members in in_flight:
            self._died(members, out)

    def wait(self, timeout: float | None) -> None:
        """Until a running job finishes, or ``timeout`` seconds (None: no limit)."""
        if self._running and not self._inline:
            cf.wait(list(self._running), timeout=timeout, return_when=cf.FIRST_COMPLETED)

    def close(self, grace_s: float = 5.0) -> None:
        """Stop the workers; a job still running after ``grace_s`` is abandoned."""
        self._inline.clear()
        self._suspects.clear()
        self._held.clear()
        self._alone = False
        if self._pool is not None:
            for fut in self._running:
                fut.cancel()
            procs = list((getattr(self._pool, "_processes", None) or {}).values())
            self._pool.shutdown(wait=False, cancel_futures=True)
            deadline = time.monotonic() + grace_s
            for p in procs:
                p.join(timeout=max(0.0, deadline - time.monotonic()))
                if p.is_alive():
                    p.terminate()
                    p.join(timeout=2.0)
            self._pool = None
        self._running.clear()


def imap(fn: Callable[..., Any], jobs: Iterable[tuple], workers: int, *,
         on_crash: Callable[[int, str], Any] | None = None) -> Iterator[Any]:
    """``fn(*args)`` for each args tuple, results in the order given, as soon as each is ready.

    ``workers`` <= 1 runs them in this process. At most 2 x ``workers`` jobs are ahead of the
    one awaited, so memory stays bounded; ``on_crash`` gets the job's index.
    """
    todo = list(jobs)
    if workers <= 1:
        for args in todo:
            yield fn(*args)
        return
    pool = Jobs(fn, workers, on_crash=on_crash)
    done: dict[int, Any] = {}
    ahead = 2 * workers
    sent = 0
    try:
        for i in range(len(todo)):
            while i not in done:
                while sent < len(todo) and sent - i < ahead:
                    pool.submit(sent, *todo[sent])
                    sent += 1
                pool.wait(None)
                done.update(pool.collect())
            yield done.pop(i)
    finally:
        pool.close()
