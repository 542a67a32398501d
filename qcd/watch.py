"""The service: start-up catch-up, one loop step, worker processes, heartbeat and status.

Observers (qcd.intake) only enqueue; all work runs on the service thread, the one SQLite
writer. Measuring runs in worker processes; every result is committed here via the pipeline.
Imports qcd.intake, qcd.pipeline, qcd.notify, qcd.analyze (in workers); store passed in.
"""
from __future__ import annotations

import concurrent.futures as cf
import logging
import logging.handlers
import multiprocessing
import os
import queue
import signal
import socket
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from qcd.intake import (GaveUp, Hint, Intake, Ready, is_candidate_name, is_network_path,
                        scan_folder, _FolderWatch)

__all__ = ["Service", "status", "format_status", "setup_logging", "is_network_path",
           "scan_folder", "default_workers", "make_sender", "LOG_NAME"]

log = logging.getLogger("qcd.watch")

LOG_NAME = "qcd.log"


# ---------------------------------------------------------------- platform

def default_workers() -> int:
    """Measuring processes for this machine: the number of cores, at most 4."""
    return max(1, min(os.cpu_count() or 1, 4))


# ---------------------------------------------------------------- measuring

def _measure(path: str, pulse: Any, mains_hz: float | None, mode: str | None = None):
    """Runs in a worker process: one file -> FileMeasures (never raises for a bad file)."""
    from qcd.analyze import analyze_path
    return analyze_path(path, pulse=pulse, mains_hz=mains_hz, mode=mode)


def _error_measures(path: Path, kind: str, reason: str, size: int = -1, mtime: float = -1.0):
    from qcd.results import FileMeasures
    return FileMeasures(path=os.fspath(path), status="error", error=reason, error_kind=kind,
                        size=size if size >= 0 else None, mtime=mtime if mtime >= 0 else None)


def _pipeline_steps(store, rules) -> tuple[Callable, Callable, Callable]:
    """The one writer's commit, the backlog digest and the periodic tick, bound to the store."""
    from qcd import pipeline

    def commit(fm, rig, now, batch=False):
        return pipeline.commit(fm, rig, store, rules, now, batch=batch)
    return (commit, lambda now: pipeline.flush_digest(store, rules, now),
            lambda now: pipeline.tick(store, rules, now))


def make_sender(config: Any):
    """The notification sender for the config's targets, or None when there are none."""
    if not config.notify and config.notify_config is None:
        log.warning("no notification targets configured: alerts are stored but not sent")
        return None
    from qcd import notify
    return notify.Sender.from_config(config)


@dataclass
class _Job:
    ready: Ready
    submitted_at: float
    crashes: int = 0


@dataclass
class _Progress:
    total: int = 0
    done: int = 0
    started_at: float = 0.0
    last_print: float = 0.0
    tty: bool = False
    _bar_open: bool = field(default=False, repr=False)

    def tick(self, now: float, force: bool = False) -> None:
        if not self.total:
            return
        finished = self.done >= self.total
        if self.tty:
            if force or finished or now - self.last_print >= 0.2:
                width = 30
                fill = int(width * self.done / self.total)
                rate = self.done / max(now - self.started_at, 1e-9)
                sys.stderr.write(f"\rcatching up [{'#' * fill}{'.' * (width - fill)}] "
                                 f"{self.done}/{self.total} files, {rate:.1f}/s ")
                if finished:
                    sys.stderr.write("\n")
                sys.stderr.flush()
                self.last_print = now
        elif force or finished or now - self.last_print >= 30.0:
            log.info("catching up: %d of %d files measured", self.done, self.total)
            self.last_print = now
        if finished:
            self.total = self.done = 0


# ---------------------------------------------------------------- the service

class Service:
    """The watch service. ``start(now)``, then ``step(now)`` repeatedly (``run()`` does both).

    ``measure(path, rig) -> FileMeasures`` and ``commit(fm, rig, now)`` default to
    ``analyze_path`` in a process pool and ``pipeline.commit``. ``workers=0`` measures on the
    service thread (no pool). ``stat`` and the clock (``now``) are parameters for tests.
    """

    def __init__(self, config: Any, store: Any, rules: Any = None, *, sender: Any = None,
                 workers: int | None = None, catch_up: bool = True, poll_s: float = 0.25,
                 beat_s: float = 5.0, rescan_s: float = 300.0, folder_check_s: float = 2.0,
                 poll_interval_s: float = 1.0, stat=os.stat,
                 commit: Callable | None = None, measure: Callable | None = None,
                 deliver: Callable | None = None, digest: Callable | None = None,
                 progress_tty: bool | None = None) -> None:
        self.config, self.store, self.rules, self.sender = config, store, rules, sender
        self.workers = default_workers() if workers is None else max(0, int(workers))
        self.catch_up = catch_up
        self.poll_s, self.beat_s, self.rescan_s = poll_s, beat_s, rescan_s
        self.folder_check_s = folder_check_s
        self.stop_event = threading.Event()
        self.intake = Intake(settle_s=config.settle_seconds,
                             give_up_s=config.give_up_hours * 3600.0, stat=stat)
        self._stat = stat
        self._rigs = {r.name: r for r in config.rigs}
        self._events: "queue.Queue[Hint]" = queue.Queue()
        self._folders = [_FolderWatch(r, Path(os.path.abspath(f)), self._events,
                                      poll_interval_s=poll_interval_s)
                         for r in config.rigs for f in r.folders]
        if commit is None:
            self._commit, pipeline_digest, self._tick = _pipeline_steps(store, rules)
            self._digest = digest or pipeline_digest
        else:
            self._commit, self._digest, self._tick = commit, digest, None
        self.tick_s = 60.0
        self.wal_limit_bytes = 32 << 20
        self._last_tick = -1e18
        self._batch_pending = False         # backlog files were committed without messages
        self._seen: dict[tuple[str, Path], tuple[int, float]] = {}
        self._measure_inline = measure
        self._deliver = deliver
        self._pool: cf.ProcessPoolExecutor | None = None
        self._jobs: dict[cf.Future, _Job] = {}
        self._inline: list[Ready] = []
        self._last_folder_check = self._last_rescan = self._last_beat = -1e18
        self._started_at = 0.0
        self._host = socket.gethostname()
        self._last_file: dict[str, dict] = {}
        self.counts = {"measured": 0, "errors": 0, "skipped": 0, "never_settled": 0}
        self.progress = _Progress(tty=sys.stderr.isatty() if progress_tty is None
                                  else progress_tty)
        self._backlog_keys: set[tuple[str, Path]] = set()
        self._resubmit: list[_Job] = []

    # -- lifecycle

    def start(self, now: float) -> None:
        """Start observers, then queue every file not yet stored (oldest first)."""
        self._started_at = now
        for fw in self._folders:
            fw.ensure()
        self._last_folder_check = now
        if self.catch_up:
            # also flushes what a run killed mid-backlog left unannounced
            self._batch_pending = self._digest is not None
            n = self._scan_all(now, live=False)
            log.info("start-up: %d file(s) to catch up on", n)
            if n:
                self.progress = _Progress(total=n, started_at=now, last_print=now,
                                          tty=self.progress.tty)
        self._last_rescan = now
        self._heartbeat(now)

    def close(self, now: float | None = None) -> None:
        """Stop observers and workers; nothing half-written (only step() commits)."""
        for fw in self._folders:
            fw.stop()
        if self._pool is not None:
            for fut in list(self._jobs):
                fut.cancel()
            procs = list(getattr(self._pool, "_processes", {}).values())
            self._pool.shutdown(wait=False, cancel_futures=True)
            deadline = time.monotonic() + 5.0
            for p in procs:                  # abandon a long measurement: restart re-measures
                p.join(timeout=max(0.0, deadline - time.monotonic()))
                if p.is_alive():
                    p.terminate()
                    p.join(timeout=2.0)
            self._pool = None
        self._jobs.clear()
        try:
            self._heartbeat(time.time() if now is None else now, stopped=True)
        except Exception:
            log.exception("writing the last heartbeat")

    def run(self) -> int:
        """Loop until a signal (or stop_event) says stop; exit code 0 after a clean stop."""
        if threading.current_thread() is threading.main_thread():
            def _stop(signum, frame):          # signal handlers only set the event
                self.stop_event.set()
            signal.signal(signal.SIGINT, _stop)
            signal.signal(signal.SIGTERM, _stop)
            if hasattr(signal, "SIGBREAK"):
                signal.signal(signal.SIGBREAK, _stop)
        try:
            self.start(time.time())
            failures = 0
            while not self.stop_event.is_set():
                try:
                    busy = self.step(time.time())
                    failures = 0
                except Exception:             # e.g. the database locked for too long: back off
                    failures += 1
                    log.exception("service step failed (%d in a row); retrying", failures)
                    self.stop_event.wait(min(60.0, self.poll_s * 2 ** failures))
                    continue
                if not busy:
                    self.wait_idle()
        finally:
            self.close()
        log.info("stopped")
        return 0

    # -- one loop step

    def step(self, now: float) -> bool:
        """One pass: events -> intake -> workers -> commit -> deliver -> heartbeat.

        Returns True when there is more work right away (the loop then skips its wait).
        """
        self._drain_events(now)
        if now - self._last_folder_check >= self.folder_check_s:
            self._last_folder_check = now
            for fw in self._folders:
                if fw.ensure():               # started again after it was gone: look inside
                    self._scan_root(fw, now, live=True)
        if now - self._last_rescan >= self.rescan_s:
            n = self.rescan(now)
            if n:
                log.info("rescan found %d file(s) the events missed", n)
        busy = False
        capacity = max(1, 2 * self.workers)
        out = len(self._jobs) + len(self._inline)
        ready, gave_up = self.intake.check(now, backlog_window=max(0, capacity - out))
        for g in gave_up:
            self._give_up(g, now)
        for r in ready:
            self._submit(r, now)
        busy |= self._collect(now)
        self._flush_digest(now)
        if self._deliver is not None or self.sender is not None:
            try:
                (self._deliver or self._deliver_due)(now)
            except Exception:
                log.exception("delivering notifications")
        if self._tick is not None and now - self._last_tick >= self.tick_s:
            self._last_tick = now             # silences that ended with their alert still open
            try:
                self._tick(now)
            except Exception:
                log.exception("checking ended silences")
        if now - self._last_beat >= self.beat_s:
            self._heartbeat(now)
            self._checkpoint()
        self.progress.tick(now)
        return busy or bool(self._inline)

    def rescan(self, now: float) -> int:
        """Look through every rig folder now (as the periodic rescan does); files queued."""
        self._last_rescan = now
        return self._scan_all(now, live=True)

    def wait_idle(self) -> None:
        """Between steps: until a measurement finishes, a stop is asked for, or poll_s passed."""
        if self._jobs:
            cf.wait(list(self._jobs), timeout=self.poll_s, return_when=cf.FIRST_COMPLETED)
        else:
            self.stop_event.wait(self.poll_s)

    def _deliver_due(self, now: float) -> None:
        from qcd import notify
        notify.deliver_due(self.store, self.sender, now)

    def queue_len(self) -> int:
        return len(self.intake) + len(self._jobs) + len(self._inline)

    # -- intake

    def _drain_events(self, now: float) -> None:
        while True:
            try:
                hint = self._events.get_nowait()
            except queue.Empty:
                return
            rig_name = hint.rig
            rig = self._rigs.get(rig_name)
            if rig is None:
                continue
            p = Path(hint.path)
            if hint.what == "removed":
                self.intake.discard(rig_name, p)
            elif hint.what == "root_gone":
                self._last_folder_check = -1e18      # check the folders on this step
            elif hint.what == "folder":              # a folder moved in or made: look inside
                root = self._root_of(rig, p)
                if root is None or not is_candidate_name(p / "x", ("x",), root):
                    continue                         # a hidden folder
                for fp, st in scan_folder(p, rig.patterns):
                    if self._needs_measuring(rig_name, fp, st):
                        self.intake.offer(rig_name, fp, now, live=True)
            elif is_candidate_name(p, rig.patterns, self._root_of(rig, p)):
                self.intake.offer(rig_name, p, now, live=True, closed=hint.what == "closed")

    def _root_of(self, rig, p: Path) -> Path | None:
        for fw in self._folders:
            if fw.rig.name == rig.name and (fw.root == p or fw.root in p.parents):
                return fw.root
        return None

    def _needs_measuring(self, rig: str, path: Path, st: os.stat_result) -> bool:
        # files committed in this run (a copy of content already stored has no row of its own)
        if self._seen.get((rig, path)) == (st.st_size, st.st_mtime):
            return False
        state = self.store.file_state(rig, os.fspath(path))
        return state is None or state.size != st.st_size or state.mtime != st.st_mtime

    def _scan_root(self, fw: _FolderWatch, now: float, *, live: bool) -> int:
        n = 0
        for p, st in scan_folder(fw.root, fw.rig.patterns):
            if (fw.rig.name, p) in self.intake._items or not self._needs_measuring(
                    fw.rig.name, p, st):
                continue
            self.intake.offer(fw.rig.name, p, now, live=live, mtime=st.st_mtime)
            if not live:
                self._backlog_keys.add((fw.rig.name, p))
            n += 1
        return n

    def _scan_all(self, now: float, *, live: bool) -> int:
        n = 0
        for fw in self._folders:
            if fw.root.is_dir():
                n += self._scan_root(fw, now, live=live)
        return n

    # -- measuring and committing

    def _submit(self, r: Ready, now: float) -> None:
        if not self._needs_measuring(r.rig, r.path, _StatLike(r.size, r.mtime)):
            self.counts["skipped"] += 1
            self._backlog_done(r)
            return
        if self.workers == 0:
            self._inline.append(r)
            return
        if self._pool is None:
            self._pool = _new_pool(self.workers)
        rig = self._rigs[r.rig]
        fut = self._pool.submit(_measure, os.fspath(r.path), rig.test_pulse, rig.mains_hz,
                                rig.mode)
        self._jobs[fut] = _Job(r, now)

    def _collect(self, now: float) -> bool:
        if self._inline:                      # workers=0: one file per step, on this thread
            r = self._inline.pop(0)
            rig = self._rigs[r.rig]
            measure = self._measure_inline or (lambda p, rg: _measure(p, rg.test_pulse,
                                                                      rg.mains_hz, rg.mode))
            self._finish(r, measure(os.fspath(r.path), rig), now)
            return True
        done = [f for f in self._jobs if f.done()]
        broken = False
        for fut in done:
            job = self._jobs.pop(fut)
            try:
                fm = fut.result()
            except cf.process.BrokenProcessPool:
                broken = True
                job.crashes += 1
                if job.crashes >= 2:
                    self._finish(job.ready, _error_measures(
                        job.ready.path, "internal", f"{job.ready.path}: the measuring process "
                        f"died twice on this file", job.ready.size, job.ready.mtime), now)
                else:
                    self._resubmit.append(job)
                continue
            except Exception as e:            # a bug in the measures: store, log, carry on
                log.error("measuring %s failed: %r", job.ready.path, e)
                fm = _error_measures(job.ready.path, "internal",
                                     f"{job.ready.path}: internal error while measuring: {e!r}",
                                     job.ready.size, job.ready.mtime)
            self._finish(job.ready, fm, now)
        if broken or self._resubmit:
            self._restart_pool(now)
        return bool(done)

    def _restart_pool(self, now: float) -> None:
        log.error("a measuring process died; starting new ones")
        old = self._pool
        self._pool = None
        pending = list(self._jobs.values()) + list(self._resubmit)
        self._jobs.clear()
        self._resubmit = []
        if old is not None:
            old.shutdown(wait=False, cancel_futures=True)
        for job in pending:
            self._pool = self._pool or _new_pool(self.workers)
            rig = self._rigs[job.ready.rig]
            fut = self._pool.submit(_measure, os.fspath(job.ready.path), rig.test_pulse,
                                    rig.mains_hz, rig.mode)
            self._jobs[fut] = _Job(job.ready, now, job.crashes)

    def _finish(self, r: Ready, fm: Any, now: float) -> None:
        """Commit one measured file, unless it changed while being measured (then wait again)."""
        try:
            st = self._stat(os.fspath(r.path))
        except FileNotFoundError:
            log.info("%s: removed before it was stored", r.path)
            self._backlog_done(r)
            return
        except OSError:
            st = None
        if st is not None and (st.st_size, st.st_mtime) != (r.size, r.mtime):
            log.info("%s: changed while it was measured; waiting for it to settle", r.path)
            self.intake.offer(r.rig, r.path, now, live=True)
            return
        rig = self._rigs[r.rig]
        batch = (r.rig, r.path) in self._backlog_keys
        try:
            self._call_commit(fm, rig, now, batch)
        except Exception:
            log.exception("storing %s failed; it will be measured again", r.path)
            self.intake.offer(r.rig, r.path, now + 30.0, live=r.live)
            return
        self._seen[(r.rig, r.path)] = (r.size, r.mtime)
        self._backlog_done(r)
        if fm.status == "ok":
            self.counts["measured"] += 1
            if not batch:                     # the backlog logs progress lines instead
                log.info("%s: measured and stored (rig %s)", r.path, r.rig)
        else:
            self.counts["errors"] += 1
            log.warning("%s", fm.error or f"{r.path}: error")
        self._last_file[r.rig] = {"path": os.fspath(r.path), "at": now,
                                  "status": fm.status}

    def _give_up(self, g: GaveUp, now: float) -> None:
        if not g.reason:                      # settled but never fit: measure, store the error
            self._submit(Ready(g.rig, g.path, g.size, g.mtime, True), now)
            return
        self.counts["never_settled"] += 1
        fm = _error_measures(g.path, "never_settled", g.reason, g.size, g.mtime)
        try:
            self._call_commit(fm, self._rigs[g.rig], now, (g.rig, g.path) in self._backlog_keys)
            self._last_file[g.rig] = {"path": os.fspath(g.path), "at": now, "status": "error"}
            self._backlog_done(Ready(g.rig, g.path, g.size, g.mtime, False))
        except Exception:
            log.exception("storing the never_settled error of %s", g.path)
        log.warning("%s", g.reason)

    def _call_commit(self, fm: Any, rig: Any, now: float, batch: bool) -> None:
        if batch and self._digest is not None:
            self._batch_pending = True
            self._commit(fm, rig, now, batch=True)
        else:
            self._commit(fm, rig, now)

    def _backlog_done(self, r: Ready) -> None:
        key = (r.rig, r.path)
        if key in self._backlog_keys:
            self._backlog_keys.discard(key)
            if self.progress.total:
                self.progress.done += 1

    def _flush_digest(self, now: float) -> None:
        """After the backlog: one digest message instead of one per file."""
        if self._batch_pending and not self._backlog_keys and self._digest is not None:
            self._batch_pending = False
            try:
                self._digest(now)
            except Exception:
                log.exception("writing the catch-up digest")

    # -- heartbeat

    def _checkpoint(self) -> None:
        """Keep the -wal file small (long readers, such as a report, can starve checkpoints)."""
        if self.store.wal_bytes() < self.wal_limit_bytes:
            return
        try:
            busy, _, _ = self.store.checkpoint()
            log.info("database checkpoint%s", " (readers busy; will retry)" if busy else "")
        except Exception:
            log.exception("database checkpoint")

    def _heartbeat(self, now: float, stopped: bool = False) -> None:
        self._last_beat = now
        state = {"beat_s": self.beat_s, "stopped": stopped, "workers": self.workers,
                 "intake": self.intake.counts(), "measuring": len(self._jobs) + len(self._inline),
                 "counts": dict(self.counts), "last_file": dict(self._last_file),
                 "folders": {os.fspath(fw.root): fw.state for fw in self._folders},
                 "catch_up": {"total": self.progress.total, "done": self.progress.done}}
        self.store.beat(os.getpid(), self._host, self._started_at, now, self.queue_len(), state)


class _StatLike:
    __slots__ = ("st_size", "st_mtime")

    def __init__(self, size: int, mtime: float) -> None:
        self.st_size, self.st_mtime = size, mtime


def _new_pool(workers: int) -> cf.ProcessPoolExecutor:
    # spawn: fork with observer threads running is unsafe (and warns on 3.12+), and spawned
    # workers are our own children, which _watch_parent ends when the service is killed
    return cf.ProcessPoolExecutor(max_workers=workers,
                                  mp_context=multiprocessing.get_context("spawn"),
                                  initializer=_watch_parent, initargs=(os.getpid(),))


def _watch_parent(pid: int) -> None:
    """In a worker: exit when the service process is gone (kill -9 leaves no one to stop us)."""
    # Ctrl-C reaches the whole process group: the service decides, workers carry on quietly
    signal.signal(signal.SIGINT, signal.SIG_IGN)

    def watch() -> None:
        while _pid_alive(pid):
            time.sleep(1.0)
        os._exit(0)
    threading.Thread(target=watch, name="qcd-parent-watch", daemon=True).start()


# ---------------------------------------------------------------- logging and status

def setup_logging(database: Path, *, debug: bool = False, max_bytes: int = 5 << 20,
                  backups: int = 5) -> Path:
    """A rotating log file beside the database (qcd.log, 5 MB x 5); returns its path."""
    path = Path(database).parent / LOG_NAME
    path.parent.mkdir(parents=True, exist_ok=True)
    handler = logging.handlers.RotatingFileHandler(path, maxBytes=max_bytes,
                                                   backupCount=backups, encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger("qcd")
    root.addHandler(handler)
    root.setLevel(logging.DEBUG if debug else logging.INFO)
    return path


def _pid_alive(pid: int) -> bool:
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


def status(store: Any, now: float, *, host: str | None = None) -> dict:
    """What `qcd status` shows: alive or not, queue, last file per rig, alerts, outbox."""
    hb = store.heartbeat()
    host = socket.gethostname() if host is None else host
    out: dict[str, Any] = {"alive": False, "reason": "the service has never run on this "
                                                     "database", "heartbeat": None}
    if hb:
        st = hb.get("state") or hb.get("state_json") or {}
        if isinstance(st, str):
            import json
            st = json.loads(st)
        beat_s = float(st.get("beat_s", 5.0))
        age = now - float(hb["beat_at"])
        same_host = hb.get("host") == host
        pid_ok = _pid_alive(int(hb.get("pid") or 0)) if same_host else True
        alive = (not st.get("stopped")) and age < 3 * beat_s and pid_ok
        if alive:
            reason = f"alive (pid {hb.get('pid')} on {hb.get('host')}, last beat {age:.1f} s ago)"
        elif st.get("stopped"):
            reason = f"stopped cleanly {age:.0f} s ago"
        elif not pid_ok:
            reason = f"not running: pid {hb.get('pid')} is gone (last beat {age:.0f} s ago)"
        else:
            reason = f"not responding: last beat {age:.0f} s ago (expected every {beat_s:g} s)"
        out.update(alive=alive, reason=reason, heartbeat=hb, beat_age_s=age,
                   queue_len=hb.get("queue_len"), intake=st.get("intake"),
                   measuring=st.get("measuring"), folders=st.get("folders", {}),
                   catch_up=st.get("catch_up"), counts=st.get("counts"))
    last: dict[str, Any] = {}
    for rig in store.rigs():
        files = store.files(rig=rig)
        if files:
            f = max(files, key=lambda r: r.get("analysed_at") or 0)
            last[rig] = {"path": f.get("path"), "status": f.get("status"),
                         "analysed_at": f.get("analysed_at"), "error": f.get("error")}
    out["last_file"] = last
    out["open_alerts"] = list(store.open_alerts())
    out["outbox"] = store.outbox_counts()
    return out


def _ago(now: float, t: float | None) -> str:
    if t is None:
        return "-"
    s = now - t
    if s < 120:
        return f"{s:.0f} s ago"
    if s < 7200:
        return f"{s / 60:.0f} min ago"
    if s < 172800:
        return f"{s / 3600:.1f} h ago"
    return f"{s / 86400:.1f} days ago"


def format_status(st: dict, now: float) -> str:
    """Plain text for the terminal."""
    lines = [f"service: {st['reason']}"]
    if st.get("alive"):
        intake = st.get("intake") or {}
        lines.append(f"queue: {st.get('queue_len', 0)} file(s) (settling live "
                     f"{intake.get('live', 0)}, backlog {intake.get('backlog', 0)}, measuring "
                     f"{st.get('measuring', 0)})")
        cu = st.get("catch_up") or {}
        if cu.get("total"):
            lines.append(f"catching up: {cu.get('done', 0)} of {cu['total']} files")
        for folder, state in (st.get("folders") or {}).items():
            lines.append(f"folder {folder}: {state}")
    if st["last_file"]:
        lines.append("last file per rig:")
        for rig, f in sorted(st["last_file"].items()):
            extra = f" ({f['error']})" if f.get("status") != "ok" and f.get("error") else ""
            lines.append(f"  {rig}: {f['path']}  {f['status']}{extra}, "
                         f"{_ago(now, f.get('analysed_at'))}")
    else:
        lines.append("no files stored yet")
    alerts = st["open_alerts"]
    lines.append(f"open alerts: {len(alerts)}")
    for a in alerts[:20]:
        a = a if isinstance(a, dict) else getattr(a, "__dict__", {})
        ch = a.get("channel")
        where = f" (channel {ch})" if isinstance(ch, int) and ch >= 0 else ""
        lines.append(f"  {a.get('rig')}: {a.get('measure') or ''} {a.get('rule') or ''}{where}, "
                     f"{a.get('state')} since {_ago(now, a.get('opened_at'))}")
    ob = st["outbox"]
    lines.append(f"messages: {ob.get('pending', 0)} pending, {ob.get('stuck', 0)} stuck, "
                 f"{ob.get('sent', 0)} sent")
    return "\n".join(lines)
