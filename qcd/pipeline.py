"""One home for the step order: analyze -> judge -> alerts -> store (one transaction) -> deliver.

``process`` measures and commits one file; ``commit`` is the second half for a FileMeasures
measured elsewhere (the service's workers); ``flush_digest`` ends a backlog with one message;
``tick`` announces alerts whose silence ended. Only here are unexpected errors caught: a bad
file becomes an error row, a bug becomes error_kind 'internal' (logged with its traceback).
Imports qcd.analyze, qcd.recording (header times for ordering), qcd.judge, qcd.alerts,
qcd.notify, qcd.errors.
"""
from __future__ import annotations

import logging
import os
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterable

from qcd import alerts
from qcd.analyze import analyze_path
from qcd.errors import RecordingError, StoreError
from qcd.judge import Finding, judge
from qcd.results import FileMeasures, file_time

if TYPE_CHECKING:
    from qcd.config import RigConfig
    from qcd.notify import Sender
    from qcd.ruleset import Rules
    from qcd.store import Store

__all__ = ["process", "commit", "flush_digest", "tick", "judge_file", "scan", "ScanResult",
           "recording_order", "DIGEST_FILES"]

# More files than this in one ``scan`` is a backlog: one digest instead of a message per file.
DIGEST_FILES = 20

log = logging.getLogger(__name__)


def _error(path: Any, kind: str, reason: str, fm: FileMeasures | None = None) -> FileMeasures:
    if fm is not None:
        return replace(fm, status="error", error_kind=kind, error=reason)
    return FileMeasures(path=os.fspath(path), status="error", error=reason, error_kind=kind)


def judge_file(fm: FileMeasures, rig: RigConfig, store: Store, rules: Rules, now: float
               ) -> list[Finding]:
    """The judge with the rig's history bound to the store (files recorded before this one)."""
    st = rules.settings
    name, before = rig.name, file_time(fm.recorded_at, fm.mtime, now)

    def history(mode: str, channel: int, measure: str) -> list[tuple[float, float]]:
        return store.history(name, mode, channel, measure, limit=st.history_files,
                             days=st.history_days, before=before)
    return judge(fm, name, history, rules, now)


def _changed(before: dict[str, dict], after: dict[str, alerts.AlertState]) -> list[dict]:
    out = []
    for key, s in after.items():
        d = s.to_dict()
        if before.get(key) != d:
            out.append(d)
    return out


def _deliver(store: Store, sender: Sender | None, now: float) -> None:
    if sender is None:
        return
    from qcd.notify import deliver_due
    try:
        deliver_due(store, sender, now)
    except StoreError:
        raise
    except Exception:                        # delivery trouble never loses the stored file
        log.exception("delivering notifications")


def _end_resolved_silences(store: Store, now: float) -> None:
    """End 'until resolved' silences once every alert they muted has resolved."""
    open_ended = [s for s in store.active_silences(now) if s.end_at is None]
    if not open_ended:
        return
    states = store.alert_states().values()
    for sil in open_ended:
        used = any(sil.id in (st.get("spent") or []) for st in states)
        live = any(sil.id in (st.get("silences") or []) for st in states)
        if used and not live:
            store.end_silence(sil.id, now)
            log.info("silence %s (%s) ended: its alerts resolved", sil.id, sil.reason)


def commit(fm: FileMeasures, rig: RigConfig, store: Store, rules: Rules, now: float,
           sender: Sender | None = None, *, batch: bool = False) -> FileMeasures:
    """Judge a measured file, advance its rig's alerts and store it all in one transaction.

    Never raises for a bad file; a StoreError (the database itself failing) propagates.
    With ``batch`` no message is queued per file (see ``flush_digest``).
    """
    name = rig.name
    try:
        findings = judge_file(fm, rig, store, rules, now)
        before = store.alert_states(name)
        states, messages = alerts.advance(before, findings, store.active_silences(now), now,
                                          rules.settings, batch=batch)
        changed = _changed(before, states)
    except StoreError:
        raise
    except Exception as e:
        log.exception("judging %s", fm.path)
        fm = _error(fm.path, "internal", f"{fm.path}: internal error while judging "
                                        f"({type(e).__name__}: {e})", fm)
        findings, changed, messages = [], [], []
    store.commit_file(name, fm, analysed_at=now, findings=findings, alert_states=changed,
                      messages=messages)
    if changed:
        _end_resolved_silences(store, now)
    _deliver(store, sender, now)             # also retries rows still pending
    return fm


def process(path: str | os.PathLike, rig: RigConfig, store: Store, rules: Rules, now: float, *,
            sender: Sender | None = None, batch: bool = False) -> FileMeasures:
    """Measure one file (rig's test pulse and mains frequency) and ``commit`` it."""
    try:
        fm = analyze_path(path, pulse=rig.test_pulse, mains_hz=rig.mains_hz, mode=rig.mode)
    except RecordingError as e:              # analyze_path should return these; be safe
        fm = _error(path, e.kind, str(e))
    except Exception as e:
        log.exception("measuring %s", path)
        fm = _error(path, "internal", f"{os.fspath(path)}: internal error while measuring "
                                      f"({type(e).__name__}: {e})")
    return commit(fm, rig, store, rules, now, sender, batch=batch)


def flush_digest(store: Store, rules: Rules, now: float, sender: Sender | None = None
                 ) -> alerts.Message | None:
    """After a backlog: one digest of what opened and resolved, queued with its states."""
    before = store.alert_states()
    states, message = alerts.flush_digest(before, store.active_silences(now), now,
                                          rules.settings)
    changed = _changed(before, states)
    if changed or message is not None:
        store.commit_alerts(changed, [message] if message is not None else [], now=now)
    if message is not None:
        _deliver(store, sender, now)
    return message


def tick(store: Store, rules: Rules, now: float, sender: Sender | None = None
         ) -> list[alerts.Message]:
    """No new file: one message per rig for open alerts whose silence has just ended."""
    before = store.alert_states()
    states, messages = alerts.tick(before, store.active_silences(now), now, rules.settings)
    changed = _changed(before, states)
    if changed or messages:
        store.commit_alerts(changed, messages, now=now)
    if messages:
        _deliver(store, sender, now)
    return messages


def _recording_time(path: Path) -> tuple[float, str]:
    """Header time of a file (for ordering), else its mtime; unreadable files sort by mtime."""
    from qcd.recording import open_recording
    try:
        with open_recording(path) as rec:
            if rec.recorded_at is not None:
                return file_time(rec.recorded_at), os.fspath(path)
    except Exception:                        # a bad file is measured (and reported) later
        pass
    try:
        return path.stat().st_mtime, os.fspath(path)
    except OSError:
        return 0.0, os.fspath(path)


def recording_order(paths: Iterable[str | os.PathLike]) -> list[Path]:
    """Files sorted by recording time (header, else mtime), then by name."""
    return sorted((Path(p) for p in paths), key=_recording_time)


@dataclass
class ScanResult:
    files: list[FileMeasures] = field(default_factory=list)
    opened: list[dict] = field(default_factory=list)      # alert rows that opened in this scan
    digest: alerts.Message | None = None                    # the digest Message, if any
    outbox: dict[str, int] = field(default_factory=dict)
    learning: dict[str, int] = field(default_factory=dict)  # mode -> good files, still learning


def scan(paths: Iterable[str | os.PathLike], rig: RigConfig, store: Store, rules: Rules, *,
         clock: Callable[[], float], sender: Sender | None = None, on_file: Callable[[FileMeasures], None] | None = None,
         batch: bool | None = None) -> ScanResult:
    """``qcd scan --store``: measure -> store -> judge -> alerts -> delivery, in recording order.

    ``batch`` (default: more than DIGEST_FILES files) ends with one digest instead of one
    message per file.
    """
    files = recording_order(paths)
    batch = len(files) > DIGEST_FILES if batch is None else batch
    name = rig.name
    was_open = {a["key"] for a in store.open_alerts(name)}
    out = ScanResult()
    for path in files:
        fm = process(path, rig, store, rules, clock(), sender=None if batch else sender,
                     batch=batch)
        out.files.append(fm)
        if on_file is not None:
            on_file(fm)
    if batch:
        out.digest = flush_digest(store, rules, clock(), sender)
    elif sender is not None:
        _deliver(store, sender, clock())
    out.opened = [a for a in store.open_alerts(name) if a["key"] not in was_open]
    out.outbox = store.outbox_counts()
    for mode in sorted({fm.mode for fm in out.files if fm.status == "ok"}):
        n = store.good_file_count(name, mode)
        if n < rules.settings.learning_files:
            out.learning[mode] = n
    return out
