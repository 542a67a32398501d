"""Backfill an archive on a Dask distributed cluster: ``qcd scan --store --cluster ADDRESS``.

The workers measure (``pipeline.measure``: read and analyze, nothing else); this process is
the single writer that judges, stores and alerts, through ``pipeline.scan``. Scheduling, worker
restarts and retries are the engine's (dask.distributed); qcd adds only what the store needs:

- **Recording order.** Files are ordered by header time before anything is submitted (the
  headers are read here, one at a time, and dropped), measured out of order, and committed in
  order: a result waits in a reorder buffer until every earlier file of the rig is committed.
  The buffer and the futures in flight share one window, so neither grows with the archive.
  Why not "store the measures first, judge in order after": the judge and the alert lifecycle
  read the rig's stored history, so committing in order gives the same rows, alerts and
  outbox as the service and ``--workers``, and the committed files are always a prefix of
  the ordered list, which is what makes a rerun continue exactly where it stopped.
- **Resumable.** A file whose path, size and mtime are already stored for the rig is skipped
  before submitting (a stored 'internal' error - a worker that died on it - is tried again);
  content already stored under another path is recognised by its sha256, computed on the
  worker, by ``Store.commit_file``.
- **Worker deaths.** The scheduler reschedules a file whose worker died; after its
  ``distributed.scheduler.allowed-failures`` (``attempts`` - 1 for a local cluster) the file
  becomes an 'internal' error row naming the worker. Any other failure of the engine stops the
  backfill with a ClusterError; what was committed stays.
- **Paths.** Workers must see the files; ``path_map`` rewrites a client prefix to the workers'
  mount. A worker that cannot open a file says which worker and why (error 'unreadable').

dask and distributed are the optional extra ``qcd-ephys[cluster]``, imported only here and only
when a cluster is used. Imports qcd.pipeline, qcd.results, qcd.errors (and qcd.config, qcd.store,
qcd.ruleset, qcd.notify for types).
"""
from __future__ import annotations

import contextlib
import os
import socket
import sys
import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterable, Iterator, TextIO

from qcd import __version__
from qcd.errors import ConfigError, QcdError
from qcd.pipeline import ScanResult, error_file, measure, order_key, scan
from qcd.results import FileMeasures

if TYPE_CHECKING:
    from qcd.config import RigConfig
    from qcd.notify import Sender
    from qcd.ruleset import Rules
    from qcd.store import Store

__all__ = ["ClusterError", "Target", "parse_target", "parse_path_map", "worker_path",
           "connect", "pending", "order_keys_task", "measure_on", "measure_batch", "backfill", "Progress", "EXTRA"]

EXTRA = "qcd-ephys[cluster]"


class ClusterError(QcdError):
    """The cluster cannot be reached or cannot run qcd (not a problem of one file)."""


@dataclass(frozen=True)
class Target:
    """Where to measure: ``local`` workers started here, else a running scheduler's address."""
    address: str | None
    local: int = 0

    def __str__(self) -> str:
        return f"local:{self.local}" if self.local else str(self.address)


def parse_target(text: str) -> Target:
    """``local:N`` (a LocalCluster of N worker processes) or a scheduler address
    (``tcp://host:8786``, ``tls://...``, ``host:8786``). ConfigError naming the option."""
    text = text.strip()
    if text.startswith("local"):
        _, _, n = text.partition(":")
        if not n.isdigit() or int(n) < 1:
            raise ConfigError(None, "--cluster",
                              f"expected local:N with N at least 1 worker, got {text!r}")
        return Target(None, int(n))
    host = text.split("://", 1)[-1]
    if not host or ":" not in host or not host.rsplit(":", 1)[1].isdigit():
        raise ConfigError(None, "--cluster", f"expected local:N or a scheduler address such "
                                             f"as tcp://scheduler:8786, got {text!r}")
    return Target(text)


def parse_path_map(items: Iterable[str]) -> tuple[tuple[str, str], ...]:
    """``CLIENT=WORKER`` prefixes, longest client prefix first. ConfigError for a bad one."""
    out = []
    for item in items:
        client, sep, worker = item.partition("=")
        if not sep or not client or not worker:
            raise ConfigError(None, "--path-map",
                              f"expected CLIENT=WORKER (two path prefixes), got {item!r}")
        out.append((client, worker))
    return tuple(sorted(out, key=lambda cw: -len(cw[0])))


def worker_path(path: str | os.PathLike, path_map: tuple[tuple[str, str], ...]) -> str:
    """The path a worker opens: the first (longest) matching client prefix rewritten."""
    p = os.fspath(path)
    for client, worker in path_map:
        c = client.rstrip("/\\")
        if p == c or p.startswith(c + "/") or p.startswith(c + "\\"):
            rest = p[len(c):]
            if "\\" in worker and "/" not in worker:     # a Windows mount on the workers
                rest = rest.replace("/", "\\")
            elif "/" in worker:
                rest = rest.replace("\\", "/")
            return worker.rstrip("/\\") + rest
    return p


def _where() -> str:
    """This worker, for messages: 'worker tcp://10.0.0.5:40123 on host node07'."""
    try:
        from distributed import get_worker
        addr = get_worker().address
    except (ImportError, ValueError):
        addr = f"pid {os.getpid()}"
    return f"worker {addr} on host {socket.gethostname()}"


def measure_task(client_path: str, path: str, rig: RigConfig) -> FileMeasures:
    """What a worker runs for one file: ``pipeline.measure`` of ``path`` (the worker's view),
    stored under ``client_path``. A file the worker cannot open names the worker."""
    try:
        with open(path, "rb"):
            pass
    except OSError as e:
        st = _stat(client_path) if client_path != path else {}
        return error_file(client_path, "unreadable",
                          f"{client_path}: {_where()} cannot open {path}: "
                          f"{e.strerror or e}", **st)
    fm = measure(path, rig)
    return fm if client_path == path else replace(fm, path=client_path)


def _qcd_version() -> str:
    return __version__


def _stat(path: str | os.PathLike) -> dict[str, Any]:
    try:
        st = os.stat(path)
    except OSError:
        return {}
    return {"size": int(st.st_size), "mtime": float(st.st_mtime)}


def _import_engine() -> Any:
    try:
        import distributed
    except ImportError as e:
        raise ClusterError(f"--cluster needs dask and distributed: pip install '{EXTRA}' "
                           f"({e})") from None
    return distributed


@contextlib.contextmanager
def connect(target: Target, *, attempts: int | None = None, quiet: bool = False
            ) -> Iterator[Any]:
    """A ``distributed.Client`` on the target, closed (and a local cluster stopped) after.

    ``local:N`` starts N worker processes of one thread each. ``attempts``: how many worker
    deaths a file may cause before it is an error row (local clusters only; a running
    scheduler keeps its own ``distributed.scheduler.allowed-failures``). The workers must run
    this qcd version: checked here, ClusterError otherwise. ``quiet``: the engine logs
    warnings only (not each worker's start and stop).
    """
    distributed = _import_engine()
    import dask
    if quiet:
        import logging
        logging.getLogger("distributed").setLevel(logging.WARNING)
    stack = contextlib.ExitStack()
    try:
        if target.local:
            settings = {"distributed.scheduler.allowed-failures": max(0, (attempts or 4) - 1),
                        # the engine's sampling profiler costs a worker about 1 ms per file
                        # (measured in bench_backfill); nobody reads it here
                        "distributed.worker.profile.enabled": False,
                        # the in-process scheduler's debugging log of task transitions kept
                        # each task's arguments: 1.6-1.9 KB per file measured, 0.2-0.4 without
                        "distributed.admin.low-level-log-length": 0}
            stack.enter_context(dask.config.set(settings))
            cluster = stack.enter_context(distributed.LocalCluster(
                n_workers=target.local, processes=True, threads_per_worker=1,
                dashboard_address=":0"))   # any free port: never a clash
            client = stack.enter_context(distributed.Client(cluster))
        else:
            try:
                client = stack.enter_context(distributed.Client(target.address, timeout="30s"))
            except (OSError, TimeoutError) as e:
                raise ClusterError(f"cannot reach the scheduler at {target.address}: {e}") \
                    from None
        try:
            versions = client.run(_qcd_version)
        except Exception as e:
            raise ClusterError(f"the workers of {target} cannot run qcd ({type(e).__name__}: "
                               f"{e}); install qcd {__version__} on every worker host") from None
        wrong = {w: v for w, v in versions.items() if v != __version__}
        if wrong:
            raise ClusterError(f"workers run another qcd version than this client "
                               f"({__version__}): " + ", ".join(f"{w} has {v}"
                                                                for w, v in sorted(wrong.items())))
        yield client
    finally:
        stack.close()


def pending(paths: Iterable[str | os.PathLike], rig: RigConfig, store: Store, *,
            client: Any = None, path_map: tuple[tuple[str, str], ...] = (),
            stat: Callable[[str], os.stat_result] = os.stat) -> tuple[list[str], int]:
    """(paths not yet stored, in recording order; how many were skipped as stored).

    A file is stored when the rig's current row for its path has the same size and mtime and
    is not an 'internal' error (those are measured again). With ``client`` the headers that
    give the order are read by the cluster's workers (an archive on a file server is read
    in parallel, not one header at a time here). Only the order keys are kept (a float and
    the path string per file).
    """
    todo: list[str] = []
    skipped = 0
    for p in paths:
        p = os.fspath(p)
        try:
            st = stat(p)
        except OSError:
            st = None
        known = store.file_state(rig.name, p)
        if known is not None and st is not None and known.size == st.st_size and \
                known.mtime == float(st.st_mtime) and not _retry(store, known):
            skipped += 1
            continue
        todo.append(p)
    keys = _keys_on(client, todo, path_map) if client is not None and todo else \
        [(order_key(p)[0], p) for p in todo]
    del todo
    keys.sort()
    return [p for _, p in keys], skipped


def order_keys_task(items: list[tuple[str, str]]) -> list[tuple[float, str]]:
    """What a worker runs to order files: (header time or mtime, client path) of each
    (client path, worker path)."""
    return [(order_key(path)[0], client_path) for client_path, path in items]


def _keys_on(client: Any, paths: list[str], path_map: tuple[tuple[str, str], ...], *,
             per_task: int = 256) -> list[tuple[float, str]]:
    """The order keys of ``paths``, read on the workers, a bounded number of tasks at once.
    A task the engine gave up on (its workers died) is read here instead."""
    distributed = _import_engine()
    window = 2 * max(1, sum(client.nthreads().values()))
    ac = distributed.as_completed(with_results=True, raise_errors=False)
    index: dict[Any, int] = {}
    starts = iter(range(0, len(paths), per_task))
    stamp = f"{os.getpid()}-{time.time_ns()}"

    def submit() -> None:
        start = next(starts, None)
        if start is None:
            return
        items = [(p, worker_path(p, path_map)) for p in paths[start:start + per_task]]
        fut = client.submit(order_keys_task, items, pure=False, key=f"qcd-order-{stamp}-{start}")
        index[fut.key] = start
        ac.add(fut)
    for _ in range(window):
        submit()
    keys: list[tuple[float, str]] = []
    try:
        for fut, value in ac:
            start = index.pop(fut.key)
            if fut.status != "error" and isinstance(value, list):
                keys.extend(value)
            elif _killed(fut, value, distributed):
                keys.extend((order_key(p)[0], p) for p in paths[start:start + per_task])
            else:
                e = value[1] if isinstance(value, tuple) else value
                raise ClusterError(f"the cluster failed while reading headers for the order "
                                   f"({type(e).__name__}: {e}); nothing was stored yet")
            fut.release()
            submit()
    finally:
        ac.clear()
    return keys


def _retry(store: Store, known: Any) -> bool:
    if known.status != "error":
        return False
    fm = store.measured(known.id)
    return fm is not None and fm.error_kind == "internal"


def measure_batch(items: list[tuple[str, str]], rig: RigConfig,
                  task: Callable[..., FileMeasures] = measure_task) -> list[FileMeasures]:
    """What a worker runs for a batch of files: ``task`` for each (client path, worker path)."""
    return [task(client_path, path, rig) for client_path, path in items]


def measure_on(client: Any, files: list[str] | list[Path], rig: RigConfig, *,
               path_map: tuple[tuple[str, str], ...] = (), window: int | None = None,
               per_task: int | None = None,
               task: Callable[..., FileMeasures] = measure_task) -> Iterator[FileMeasures]:
    """Each file measured on the cluster, yielded in the order of ``files``.

    Files go out in batches of ``per_task`` consecutive files, one engine task each (default 8,
    fewer when there are few files per worker thread): the engine's cost is per task, so a
    batch spreads it. At most ``window`` files are submitted and not yet yielded (default:
    two batches per worker thread, at least 16): that bounds both the futures in flight and
    the reorder buffer. A batch whose workers died too often (the engine's KilledWorker) is
    sent again one file at a time; a file alone that still kills its workers is an 'internal'
    error row. Any other failure raises ClusterError.
    """
    distributed = _import_engine()
    n = len(files)
    threads = max(1, sum(client.nthreads().values())) if per_task is None or window is None \
        else 1
    if per_task is None:
        per_task = max(1, min(8, n // (4 * threads)))
    batch = max(1, int(per_task))
    if window is None:
        window = max(16, 2 * threads * batch)
    window = max(batch, int(window))
    done: dict[int, FileMeasures] = {}
    index: dict[Any, tuple[int, int]] = {}
    # results come back in the engine's own threads as files finish, not one round trip each
    ac = distributed.as_completed(with_results=True, raise_errors=False)
    stamp = f"{os.getpid()}-{time.time_ns()}"

    def submit(start: int, count: int) -> None:
        items = []
        for i in range(start, start + count):
            p = os.fspath(files[i])
            items.append((p, worker_path(p, path_map)))
        fut = client.submit(measure_batch, items, rig, task, pure=False,
                            key=f"qcd-measure-{stamp}-{start}-{count}")
        index[fut.key] = (start, count)
        ac.add(fut)

    submitted = nxt = 0
    suspects: list[int] = []          # files of a batch whose workers kept dying, retried alone
    retried: set[int] = set()
    alone = False                     # one of them in flight: they go one at a time, so a file
    try:                              # that kills its worker takes no other retried one along
        while nxt < n:
            if suspects and not alone:
                i = suspects.pop(0)
                retried.add(i)
                submit(i, 1)
                alone = True
            while submitted < n and submitted < nxt + window:
                count = min(batch, n - submitted)
                submit(submitted, count)
                submitted += count
            fut, value = next(ac)
            start, count = index.pop(fut.key)
            if count > 1 and _killed(fut, value, distributed):
                suspects.extend(range(start, start + count))
            else:
                if count == 1 and start in retried:
                    retried.discard(start)
                    alone = False
                got = _result(fut, value, files[start:start + count], distributed)
                for j, fm in enumerate(got):
                    done[start + j] = fm
            fut.release()
            while nxt in done:
                yield done.pop(nxt)
                nxt += 1
    finally:
        ac.clear()
        # futures not yet done are released with their keys; nothing is committed for them


def _killed(fut: Any, value: Any, distributed: Any) -> bool:
    e = value[1] if fut.status == "error" and isinstance(value, tuple) else value
    return isinstance(e, distributed.KilledWorker)


def _result(fut: Any, value: Any, paths: list, distributed: Any) -> list[FileMeasures]:
    """The FileMeasures a finished future brought back, or the error row of a file whose
    workers kept dying; ClusterError for any other failure (the engine's, not the file's)."""
    if fut.status != "error" and isinstance(value, list):
        return value
    e = value[1] if fut.status == "error" and isinstance(value, tuple) else value
    if isinstance(e, distributed.KilledWorker) and len(paths) == 1:
        path = paths[0]
        worker = getattr(e, "last_worker", None)
        where = getattr(worker, "address", None) or "a worker"
        n = getattr(e, "allowed_failures", None)
        times = f"{n + 1} times" if n is not None else "too often"
        return [error_file(path, "internal",
                           f"{os.fspath(path)}: the worker measuring it died {times} "
                           f"(last {where}); tried again on the next backfill",
                           **_stat(path))]
    raise ClusterError(f"the cluster failed while measuring {os.fspath(paths[0])}"
                       f"{f' and {len(paths) - 1} more' if len(paths) > 1 else ''} "
                       f"({type(e).__name__}: {e}); files committed so far are kept, "
                       f"run the same command again to continue")


class Progress:
    """Files done of total, rate, ETA and errors, printed every ``every_s`` seconds."""

    def __init__(self, total: int, *, out: TextIO | None = None, every_s: float = 5.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.total, self.out, self.every_s, self.clock = total, out or sys.stdout, every_s, clock
        self.done = self.errors = 0
        self.start = self.last = clock()

    def __call__(self, fm: FileMeasures) -> None:
        self.done += 1
        if fm.status != "ok":
            self.errors += 1
            print(f"error  {fm.path}  ({fm.error_kind}): {fm.error}", file=self.out, flush=True)
        now = self.clock()
        if now - self.last >= self.every_s or self.done == self.total:
            self.last = now
            print(self.line(now), file=self.out, flush=True)

    def line(self, now: float | None = None) -> str:
        now = self.clock() if now is None else now
        elapsed = max(now - self.start, 1e-9)
        rate = self.done / elapsed
        left = self.total - self.done
        eta = _duration(left / rate) if rate > 0 else "unknown"
        return (f"backfill: {self.done}/{self.total} files, {rate:.1f} files/s, "
                f"ETA {eta if left else '0s'}, {self.errors} error{'s' * (self.errors != 1)}")


def _duration(s: float) -> str:
    s = int(round(s))
    if s < 60:
        return f"{s}s"
    if s < 3600:
        return f"{s // 60}m{s % 60:02d}s"
    return f"{s // 3600}h{s % 3600 // 60:02d}m"


def backfill(paths: Iterable[str | os.PathLike], rig: RigConfig, store: Store, rules: Rules, *,
             client: Any, clock: Callable[[], float], sender: Sender | None = None,
             on_file: Callable[[FileMeasures], None] | None = None, batch: bool | None = None,
             path_map: tuple[tuple[str, str], ...] = (), window: int | None = None,
             per_task: int | None = None, task: Callable[..., FileMeasures] = measure_task,
             on_start: Callable[[int, int], None] | None = None) -> ScanResult:
    """``pipeline.scan`` with the measuring on ``client``'s cluster, skipping stored files.

    ``on_start(to_measure, skipped)`` is called once the files are ordered. The result keeps
    only the error files (``count`` counts all), so memory does not grow with the archive.
    """
    files, skipped = pending(paths, rig, store, client=client, path_map=path_map)
    if on_start is not None:
        on_start(len(files), skipped)

    def measured(ordered: list[str]) -> Iterator[FileMeasures]:
        return measure_on(client, ordered, rig, path_map=path_map, window=window,
                          per_task=per_task, task=task)
    return scan(files, rig, store, rules, clock=clock, sender=sender, on_file=on_file,
                batch=batch, measured=measured, keep_files=False)
