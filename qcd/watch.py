"""The service: start-up catch-up, one loop step, heartbeat.

Observers (qcd.intake) only enqueue; all work runs on the service thread, the one SQLite
writer. Measuring (``pipeline.measure``) runs in worker processes (qcd.workers); every result
is committed here via the pipeline. Imports qcd.intake, qcd.pipeline, qcd.workers, qcd.notify;
store passed in. `qcd status` reads what the heartbeat writes (qcd.status).
"""
from __future__ import annotations

import logging
import logging.handlers
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

from qcd import pipeline
from qcd.errors import StoreError, printable
from qcd.results import file_time
from qcd.intake import (GaveUp, Hint, Intake, Ready, is_candidate_name, is_network_path,
                        scan_folder, _FolderWatch)
from qcd.workers import Jobs, default_workers

__all__ = ["Service", "setup_logging", "is_network_path", "scan_folder", "make_sender",
           "LOG_NAME", "ServiceLock"]

log = logging.getLogger("qcd.watch")

LOG_NAME = "qcd.log"


def make_sender(config: Any):
    """The notification sender for the config's targets, or None when there are none."""
    digest = getattr(config, "digest", None)
    if not config.notify and config.notify_config is None and not (
            digest and any("://" in t for t in digest.targets)):
        log.warning("no notification targets configured: alerts are stored but not sent")
        return None
    from qcd import notify
    return notify.Sender.from_config(config)


def _pipeline_steps(store, rules, zones=None) -> tuple[Callable, Callable, Callable]:
    """The one writer's commit, the backlog digest and the periodic tick, bound to the store
    (``zones``: rig -> its time zone, for the times in messages)."""
    def commit(fm, rig, now, batch=False):
        return pipeline.commit(fm, rig, store, rules, now, batch=batch)
    return (commit, lambda now: pipeline.flush_digest(store, rules, now, zones=zones),
            lambda now: pipeline.tick(store, rules, now, zones=zones))


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

    Files are measured with ``pipeline.measure`` in ``workers`` processes (``workers=0``: on
    the service thread, one file per step) and committed with ``pipeline.commit``, or with
    ``commit(fm, rig, now)`` when given (no backlog digest then). ``stat`` and the clock
    (``now``) are parameters for tests.
    """

    def __init__(self, config: Any, store: Any, rules: Any = None, *, sender: Any = None,
                 workers: int | None = None, catch_up: bool = True, poll_s: float = 0.25,
                 beat_s: float = 5.0, rescan_s: float = 300.0, folder_check_s: float = 2.0,
                 poll_interval_s: float = 1.0, stat=os.stat, commit: Callable | None = None,
                 progress_tty: bool | None = None, daily: Callable | None = None) -> None:
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
        self._folders = [_FolderWatch(r, Path(os.path.realpath(f)), self._events,
                                      poll_interval_s=poll_interval_s)
                         for r in config.rigs for f in r.folders]
        if commit is None:
            self._commit, self._digest, self._tick = _pipeline_steps(
                store, rules, {r.name: getattr(r, "timezone", None) for r in config.rigs})
        else:
            self._commit, self._digest, self._tick = commit, None, None
        self.tick_s = 60.0
        self._daily = daily                  # daily(now): queue the day's report when due
        self.daily_s = 30.0
        self._last_daily = -1e18
        self.wal_limit_bytes = 32 << 20
        self._last_tick = -1e18
        self._batch_pending = False         # backlog files were committed without messages
        self._seen: dict[tuple[str, Path], tuple[int, float]] = {}
        self._jobs = Jobs(pipeline.measure, self.workers, on_crash=self._crashed)
        self._last_folder_check = self._last_rescan = self._last_beat = -1e18
        self._started_at = 0.0
        self._host = socket.gethostname()
        self._last_file: dict[str, dict] = {}
        self.counts = {"measured": 0, "errors": 0, "skipped": 0, "never_settled": 0}
        self.progress = _Progress(tty=sys.stderr.isatty() if progress_tty is None
                                  else progress_tty)
        self._backlog_keys: set[tuple[str, Path]] = set()
        self._unreadable: set[tuple[str, Path]] = set()   # stored as unreadable in this run
        self._store_trouble: dict | None = None   # {reason, since, failures} while storing fails
        self.store_retry_s = 30.0           # first wait after a failed store (doubles to 10 min)
        self._retry: list[tuple[float, Ready, Any]] = []   # measured, not stored yet
        # group commit: finished files wait (at most group_files, group_s) to share one
        # transaction; see _finish_group and DEVELOPERS.md
        self.group_files, self.group_s = 32, 0.25
        # backlog batches: small files share one worker job (see _submit_all)
        self.batch_files, self.batch_bytes = 8, 4 << 20
        self._finished: list[tuple[Ready, Any]] = []
        self._finished_since = 0.0
        self._now = 0.0                     # the clock of the last step (the courier's clock)
        self._courier: Any = None

    # -- lifecycle

    def start(self, now: float) -> None:
        """Start observers, then queue every file not yet stored (oldest first)."""
        self._started_at = self._now = now
        if self.sender is not None and self._courier is None:
            from qcd.notify import Courier     # delivery off the measuring path
            self._courier = Courier(self.store, self.sender, lambda: self._now).start()
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
        self._jobs.close()                   # abandon a long measurement: restart re-measures
        if self._finished:                   # measured, waiting for their group: stored now
            group, self._finished = self._finished, []
            try:
                self._finish_group(group, time.time() if now is None else now)
            except Exception:                 # not stored: measured again at the next start
                log.exception("storing the last measured files")
        if self._courier is not None:        # a send under way is not waited for long
            if not self._courier.stop(wait_s=2.0):
                log.warning("stopping while a notification is being sent; an unmarked "
                            "message is sent again at the next start")
            self._courier = None
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
        self._now = max(self._now, now)
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
        capacity = max(1, 2 * self.workers * self.batch_files)   # files out at a time
        out = len(self._jobs)
        ready, gave_up = self.intake.check(now, backlog_window=max(0, capacity - out))
        for g in gave_up:
            self._give_up(g, now)
        self._submit_all(ready, now)
        busy |= self._collect(now)
        if self._retry:
            self._retry_commits(now)
        self._flush_digest(now)
        if self._daily is not None and now - self._last_daily >= self.daily_s \
                and not self._batch_pending:  # after the start-up backlog, so it is counted
            self._last_daily = now
            busy = True                       # a daily report may have been queued
            try:
                self._daily(now)
            except Exception:
                log.exception("queueing the daily report")
        if self._courier is not None and busy:
            self._courier.wake()              # new messages may be queued
        if self._tick is not None and now - self._last_tick >= self.tick_s:
            self._last_tick = now             # mutes that ended with their alert still open
            try:
                self._tick(now)
            except Exception:
                log.exception("checking ended mutes")
        if now - self._last_beat >= self.beat_s:
            try:
                self._heartbeat(now)
            except Exception as e:
                self._last_beat = now
                self._store_failed(e, now, "writing the heartbeat")
            else:
                self._checkpoint()
        self.progress.tick(now)
        return busy or (self.workers == 0 and len(self._jobs) > 0)

    def rescan(self, now: float) -> int:
        """Look through every rig folder now (as the periodic rescan does); files queued."""
        self._last_rescan = now
        return self._scan_all(now, live=True)

    def wait_idle(self) -> None:
        """Between steps: until a measurement finishes, a stop is asked for, or poll_s passed."""
        if self.workers and len(self._jobs):
            self._jobs.wait(self.poll_s)
        else:
            self.stop_event.wait(self.poll_s)

    def queue_len(self) -> int:
        return len(self.intake) + len(self._jobs) + len(self._retry) + len(self._finished)

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
                    if self._needs(rig_name, fp, st, default=True):
                        self.intake.offer(rig_name, fp, now, live=True)
            elif is_candidate_name(p, rig.patterns, self._root_of(rig, p)):
                self.intake.offer(rig_name, p, now, live=True, closed=hint.what == "closed")

    def _root_of(self, rig, p: Path) -> Path | None:
        for fw in self._folders:
            if fw.rig.name == rig.name and (fw.root == p or fw.root in p.parents):
                return fw.root
        return None

    def _needs(self, rig: str, path: Path, st: Any, *, default: bool) -> bool:
        """``_needs_measuring``, or ``default`` when the store cannot be read."""
        try:
            return self._needs_measuring(rig, path, st)
        except Exception as e:
            self._store_failed(e, self._now, f"looking up {printable(path)}")
            return default

    def _needs_measuring(self, rig: str, path: Path, st: os.stat_result) -> bool:
        # files committed in this run; an unreadable one is tried again (its permissions may
        # have been fixed, which changes neither its size nor its mtime)
        if self._seen.get((rig, path)) == (st.st_size, st.st_mtime) and \
                (rig, path) not in self._unreadable:
            return False
        state = self.store.file_state(rig, os.fspath(path))
        return (state is None or state.size != st.st_size or state.mtime != st.st_mtime
                or state.error_kind == "unreadable")

    def _scan_root(self, fw: _FolderWatch, now: float, *, live: bool) -> int:
        n = 0
        for p, st in scan_folder(fw.root, fw.rig.patterns):
            if (fw.rig.name, p) in self.intake._items or not self._needs(
                    fw.rig.name, p, st, default=False):        # the next rescan tries again
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
        self._submit_all([r], now)

    def _submit_all(self, ready: list[Ready], now: float) -> None:
        """Hand the ready files to the workers: a live file, or a large one, as a job of its
        own (measured at once); small backlog files several to a job (``batch_files``, at
        most ``batch_bytes`` together), which saves a trip through the pool's queues each."""
        batch: list[tuple[Ready, tuple, dict]] = []
        size = 0
        for r in ready:
            if not self._needs(r.rig, r.path, _StatLike(r.size, r.mtime), default=True):
                self.counts["skipped"] += 1
                self._backlog_done(r)
                continue
            job = (r, (os.fspath(r.path), self._rigs[r.rig]), {"recording": r.header})
            if r.live or r.size > self.batch_bytes or self.batch_files <= 1:
                self._jobs.submit_many([job])
                continue
            if batch and (len(batch) >= self.batch_files or size + r.size > self.batch_bytes):
                self._jobs.submit_many(batch)
                batch, size = [], 0
            batch.append(job)
            size += r.size
        if batch:
            self._jobs.submit_many(batch)

    def _crashed(self, r: Ready, reason: str) -> Any:
        return pipeline.error_file(r.path, "internal", f"{r.path}: {reason}", size=r.size,
                                   mtime=r.mtime)

    def _collect(self, now: float) -> bool:
        done = self._jobs.collect()
        if done and not self._finished:
            self._finished_since = now
        self._finished.extend(done)
        while self._finished and self._group_due(now):
            group = self._finished[:self.group_files]
            del self._finished[:self.group_files]
            self._finish_group(group, now)
            self._finished_since = now
        return bool(done)

    def _group_due(self, now: float) -> bool:
        """Commit the finished files now? Yes, unless more are on the way for the same
        transaction: a group waits for at most ``group_files`` files and ``group_s`` seconds,
        and a live file, or a file with nothing more being measured, goes at once."""
        if len(self._finished) >= self.group_files or not len(self._jobs) or \
                now - self._finished_since >= self.group_s:
            return True
        return any((r.rig, r.path) not in self._backlog_keys for r, _ in self._finished)

    def _finish_group(self, group: list[tuple[Ready, Any]], now: float) -> None:
        """Commit measured files, several in one transaction (one fsync for all).

        In recording order (header time, else mtime, then the path). A crash before COMMIT
        stores none of them: no intake state says they are done, so the next start measures
        them again, and their alerts and outbox rows were never written. When the group's
        transaction fails, each file is stored alone (and retried alone)."""
        group.sort(key=lambda x: (x[0].rig, file_time(x[1].recorded_at, x[1].mtime, 0.0) or 0.0,
                                  os.fspath(x[0].path)))
        todo = [(r, fm, how) for r, fm in group
                if (how := self._to_commit(r, fm, now)) is not None]
        if len(todo) > 1:
            try:
                with self.store.transaction():
                    stored = [self._call_commit(fm, self._rigs[r.rig], now, batch)
                              for r, fm, batch in todo]
            except Exception:
                log.debug("a group of %d files could not be stored together; storing each "
                          "alone", len(todo), exc_info=True)
            else:
                self._store_ok(now)
                for (r, fm, batch), got in zip(todo, stored):
                    self._stored(r, fm, got, batch, now)
                return
        for r, fm, batch in todo:
            self._commit_one(r, fm, batch, now)

    def _finish(self, r: Ready, fm: Any, now: float) -> None:
        """Commit one measured file, unless it changed while being measured (then wait again)."""
        batch = self._to_commit(r, fm, now)
        if batch is not None:
            self._commit_one(r, fm, batch, now)

    def _to_commit(self, r: Ready, fm: Any, now: float) -> bool | None:
        """None when the file is not to be stored (removed, changed while it was measured,
        still unreadable as stored); else whether it is a backlog file (``batch``)."""
        try:
            st = self._stat(os.fspath(r.path))
        except FileNotFoundError:
            log.info("%s: removed before it was stored", r.path)
            self._backlog_done(r)
            return None
        except OSError:
            st = None
        if st is not None and (st.st_size, st.st_mtime) != (r.size, r.mtime):
            log.info("%s: changed while it was measured; waiting for it to settle", r.path)
            self.intake.offer(r.rig, r.path, now, live=True)
            return None
        batch = (r.rig, r.path) in self._backlog_keys
        if fm.error_kind == "unreadable":
            self._unreadable.add((r.rig, r.path))
            try:
                state = self.store.file_state(r.rig, os.fspath(r.path))
            except Exception:                 # the commit says what is wrong
                state = None
            if state is not None and state.error_kind == "unreadable" and \
                    (state.size, state.mtime) == (r.size, r.mtime):
                self._seen[(r.rig, r.path)] = (r.size, r.mtime)     # still unreadable: as stored
                self._backlog_done(r)
                return None
        else:
            self._unreadable.discard((r.rig, r.path))
        return batch

    def _commit_one(self, r: Ready, fm: Any, batch: bool, now: float) -> None:
        try:
            stored = self._call_commit(fm, self._rigs[r.rig], now, batch)
        except Exception as e:
            wait = self._store_failed(e, now, f"storing {printable(r.path)}")
            self._retry.append((now + wait, r, fm))     # kept: stored later, not re-measured
            return
        self._store_ok(now)
        self._stored(r, fm, stored, batch, now)

    def _stored(self, r: Ready, fm: Any, stored: Any, batch: bool, now: float) -> None:
        """After the file's transaction committed: the service's own bookkeeping."""
        self._seen[(r.rig, r.path)] = (r.size, r.mtime)
        self._backlog_done(r)
        if getattr(stored, "status", None) is not None:
            fm = stored                       # what was stored ('skipped': a copy)
        if fm.status == "skipped":           # a copy of content already stored
            self.counts["skipped"] += 1
            log.info("%s", fm.error)
        elif fm.status == "ok":
            self.counts["measured"] += 1
            if not batch:                     # the backlog logs progress lines instead
                log.info("%s: measured and stored (rig %s)", r.path, r.rig)
        else:
            self.counts["errors"] += 1
            log.warning("%s", fm.error or f"{r.path}: error")
        self._last_file[r.rig] = {"path": printable(r.path), "at": now,
                                  "status": fm.status}

    def _give_up(self, g: GaveUp, now: float) -> None:
        if not g.reason:                      # settled but never fit: measure, store the error
            self._submit(Ready(g.rig, g.path, g.size, g.mtime, True), now)
            return
        self.counts["never_settled"] += 1
        fm = pipeline.error_file(g.path, "never_settled", g.reason,
                                 size=g.size if g.size >= 0 else None,
                                 mtime=g.mtime if g.mtime >= 0 else None)
        try:
            self._call_commit(fm, self._rigs[g.rig], now, (g.rig, g.path) in self._backlog_keys)
            self._last_file[g.rig] = {"path": printable(g.path), "at": now, "status": "error"}
            self._backlog_done(Ready(g.rig, g.path, g.size, g.mtime, False))
            self._store_ok(now)
        except Exception as e:
            self._store_failed(e, now, f"storing the never_settled error of {printable(g.path)}")
        log.warning("%s", g.reason)

    def _call_commit(self, fm: Any, rig: Any, now: float, batch: bool) -> Any:
        if batch and self._digest is not None:
            self._batch_pending = True
            return self._commit(fm, rig, now, batch=True)
        return self._commit(fm, rig, now)

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

    # -- storing trouble: said once, backed off

    def _store_failed(self, e: BaseException, now: float, what: str) -> float:
        """Record a failed store; returns how long the file waits before it is tried again
        (30 s doubling to 10 min). The first failure of a run of them is logged with its
        reason and told to the lab directly (not through the outbox, which may be what
        fails); the rest only at debug level."""
        from qcd.errors import QcdError
        reason = str(e) if isinstance(e, QcdError) else f"{type(e).__name__}: {e}"
        t = self._store_trouble
        if t is None:
            self._store_trouble = t = {"reason": reason, "since": now, "failures": 0}
            log.error("storing is failing: %s (%s); files stay queued and are tried again, "
                      "backing off to every 10 min", reason, what,
                      exc_info=not isinstance(e, QcdError))
            self._alarm(reason)
        else:
            log.debug("still failing (%s): %s", what, reason)
        t["failures"] += 1
        t["reason"] = reason
        return min(600.0, self.store_retry_s * 2.0 ** min(t["failures"] - 1, 10))

    def _retry_commits(self, now: float) -> bool:
        """Store again the measured files whose storing failed, once their wait is over."""
        due = [x for x in self._retry if x[0] <= now]
        if not due:
            return False
        self._retry = [x for x in self._retry if x[0] > now]
        for _, r, fm in due:
            self._finish(r, fm, now)
        return True

    def _store_ok(self, now: float) -> None:
        if self._store_trouble is not None:
            log.warning("storing works again after %d failure(s)", self._store_trouble["failures"])
            self._store_trouble = None

    def _alarm(self, reason: str) -> None:
        """Tell the lab that results are not being stored, straight to the targets."""
        if self.sender is None:
            return
        title = f"qcd on {self._host}: results are not being stored"
        body = (f"Storing measured recordings in the database is failing: {reason}\n"
                f"Files stay queued and are tried again; qcd status shows the state. This "
                f"message is sent once for this failure.")
        sender = self.sender

        def send() -> None:
            try:
                res = sender.send(title, body, "firing")
                if not res.ok:
                    log.error("could not tell the lab that storing fails: %s", res.detail)
            except Exception:
                log.exception("telling the lab that storing fails")
        threading.Thread(target=send, name="qcd-alarm", daemon=True).start()

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
                 "intake": self.intake.counts(), "measuring": len(self._jobs),
                 "counts": dict(self.counts), "last_file": dict(self._last_file),
                 "folders": {os.fspath(fw.root): fw.state for fw in self._folders},
                 "catch_up": {"total": self.progress.total, "done": self.progress.done},
                 "storing_failed": self._store_trouble}
        self.store.beat(os.getpid(), self._host, self._started_at, now, self.queue_len(), state)


class _StatLike:
    __slots__ = ("st_size", "st_mtime")

    def __init__(self, size: int, mtime: float) -> None:
        self.st_size, self.st_mtime = size, mtime


# ---------------------------------------------------------------- one service per database

class ServiceLock:
    """One service per database: an OS lock on ``DATABASE.lock`` beside it (flock on POSIX,
    msvcrt on Windows), which the OS releases when the process ends, however it ends.
    ``acquire()`` raises StoreError naming the process that holds it."""

    _WIN_OFFSET = 1 << 20                    # Windows: lock a byte past the pid text

    def __init__(self, database: Path | str) -> None:
        self.path = Path(f"{os.fspath(database)}.lock")
        self._f: Any = None

    def acquire(self) -> "ServiceLock":
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)   # as the log set-up does
        except OSError:
            pass                              # said below, with the reason
        try:
            f = open(self.path, "a+", encoding="utf-8")
        except OSError as e:
            from qcd.store import cannot_write
            why = cannot_write(self.path) or f"{self.path}: {e.strerror or e}"
            raise StoreError(f"cannot start the service: {why}") from e
        try:
            if sys.platform == "win32":
                import msvcrt
                f.seek(self._WIN_OFFSET)
                msvcrt.locking(f.fileno(), msvcrt.LK_NBLCK, 1)
            else:
                import fcntl
                fcntl.flock(f.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            f.seek(0)
            holder = f.read(200).strip() or "another process"
            f.close()
            raise StoreError(f"{self.path.with_suffix('')}: another qcd watch is using this "
                             f"database ({holder}); one service per database: stop it first, "
                             f"or give this one a database of its own") from None
        f.seek(0)
        f.truncate()
        f.write(f"pid {os.getpid()} on {socket.gethostname()}")
        f.flush()
        self._f = f
        return self

    def release(self) -> None:
        if self._f is not None:
            try:
                self._f.seek(0)
                self._f.truncate()
            except OSError:
                pass
            self._f.close()                  # closing drops the lock
            self._f = None

    def __enter__(self) -> "ServiceLock":
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()


# ---------------------------------------------------------------- logging

class _LogFile(logging.handlers.RotatingFileHandler):
    """The service's log file. When it cannot be written (a full disk), that is said once on
    stderr, and lines are dropped quietly until a write works again (no traceback per line)."""

    failing = False

    def emit(self, record: logging.LogRecord) -> None:
        super().emit(record)
        if self.failing and self.stream is not None and not self._last_failed:
            self.failing = False
            sys.stderr.write(f"qcd: the log file {self.baseFilename} can be written again\n")
        self._last_failed = False

    _last_failed = False

    def handleError(self, record: logging.LogRecord) -> None:  # noqa: N802 (logging API)
        self._last_failed = True
        if self.failing:
            return
        self.failing = True
        err = sys.exc_info()[1]
        why = getattr(err, "strerror", None) or str(err)
        try:
            sys.stderr.write(f"qcd: cannot write the log file {self.baseFilename} ({why}); "
                             f"log lines are dropped until it can\n")
        except Exception:
            pass


def setup_logging(database: Path, *, debug: bool = False, max_bytes: int = 5 << 20,
                  backups: int = 5) -> Path:
    """A rotating log file beside the database (qcd.log, 5 MB x 5); returns its path."""
    path = Path(database).parent / LOG_NAME
    path.parent.mkdir(parents=True, exist_ok=True)
    handler = _LogFile(path, maxBytes=max_bytes, backupCount=backups, encoding="utf-8",
                       errors="backslashreplace")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    from qcd.config import SECRET_FILTER
    handler.addFilter(SECRET_FILTER)         # target secrets never reach the log file
    root = logging.getLogger("qcd")
    root.addHandler(handler)
    root.setLevel(logging.DEBUG if debug else logging.INFO)
    return path
