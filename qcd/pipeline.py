"""One home for the step order: measure -> judge -> alerts -> store (one transaction) -> deliver.

``measure`` is the one measuring path (the service's workers, ``qcd scan`` with or without
``--store``); ``commit`` judges and stores what it measured; ``process`` = ``commit(measure())``.
``flush_digest`` ends a backlog with one message; ``tick`` announces alerts whose mute
ended. Only here are unexpected errors caught: a bad file becomes an error row, a bug becomes
error_kind 'internal' (logged with its traceback). Imports qcd.analyze, qcd.results,
qcd.recording and qcd.intake (headers for ordering), qcd.judge, qcd.alerts, qcd.workers,
qcd.notify, qcd.errors.
"""
from __future__ import annotations

import logging
import math
import os
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterable, Iterator

from qcd.analyze import analyze_path
from qcd.errors import StoreError, printable
from qcd.lazy import Later
from qcd.results import ChannelMeasures, FileMeasures, file_time
from qcd.workers import imap
from qcd.zones import localize


alerts, history = Later("qcd.alerts"), Later("qcd.history")
hashlib = Later("hashlib")           # the digest: only when files are stored
ChartInput, ChartState, Reference = (Later("qcd.charts", n) for n in
                                     ("ChartInput", "ChartState", "Reference"))
replay, reset = Later("qcd.charts", "replay"), Later("qcd.charts", "reset")
Finding, judge = Later("qcd.judge", "Finding"), Later("qcd.judge", "judge")

if TYPE_CHECKING:
    from qcd.config import RigConfig
    from qcd.notify import Sender
    from qcd.recording import Recording
    from qcd.ruleset import HistoryRule, RuleSettings, Rules
    from qcd.store import Store

__all__ = ["measure", "measure_all", "watched_channels", "process", "commit", "error_file",
           "flush_digest", "tick", "judge_file", "chart_input", "relearn", "scan", "ScanResult",
           "recording_order", "order_key", "DIGEST_FILES", "in_rig_zone"]

# More files than this in one ``scan`` is a backlog: one digest instead of a message per file.
DIGEST_FILES = 20

log = logging.getLogger(__name__)


def error_file(path: str | os.PathLike, kind: str, reason: str, *, size: int | None = None,
               mtime: float | None = None, sha256: str | None = None) -> FileMeasures:
    """The FileMeasures of a file that could not be measured (``kind`` as in qcd.errors)."""
    return FileMeasures(path=os.fspath(path), status="error", error=reason, error_kind=kind,
                        size=size, mtime=mtime, sha256=sha256)


def _facts(path: str | os.PathLike, digest: bool) -> dict[str, Any]:
    """Size, mtime and (with ``digest``) sha256 of a file whose measuring failed."""
    try:
        st = os.stat(path)
        out: dict[str, Any] = {"size": int(st.st_size), "mtime": float(st.st_mtime)}
        if digest:
            h = hashlib.sha256()
            with open(path, "rb") as f:
                for block in iter(lambda: f.read(1 << 22), b""):
                    h.update(block)
            out["sha256"] = h.hexdigest()
        return out
    except OSError:
        return {}


def measure(path: str | os.PathLike, rig: RigConfig, *, recording: Recording | None = None,
            digest: bool = True) -> FileMeasures:
    """Measure one file with the rig's test pulse, mains frequency and mode. Never raises.

    ``recording``: its header already read (intake's ``Ready.header``); ``digest``: compute
    the sha256 the store's duplicate check uses. The one place where an unexpected exception
    becomes an 'internal' error row (logged with its traceback).
    """
    pulse, mains_hz, mode = rig.test_pulse, rig.mains_hz, rig.mode
    try:
        return watched_channels(analyze_path(path, pulse=pulse, mains_hz=mains_hz, mode=mode,
                                             digest=digest, recording=recording), rig)
    except MemoryError as e:
        reason = f"{os.fspath(path)}: out of memory while measuring ({e})"
    except Exception as e:
        log.exception("internal error while measuring %s", path)
        reason = (f"{os.fspath(path)}: internal error while measuring "
                  f"({type(e).__name__}: {e})")
    return error_file(path, "internal", reason, **_facts(path, digest))


def _label(ch: ChannelMeasures) -> str:
    unit = f", {ch.unit}" if ch.unit and ch.unit != "?" else ""
    return f"{ch.index} ({ch.name}{unit})" if ch.name not in ("", "?") else \
        f"{ch.index} ({ch.unit})" if unit else str(ch.index)


def watched_channels(fm: FileMeasures, rig: RigConfig) -> FileMeasures:
    """The file with only the channels the rig watches, each under its display name.

    ``rig.channels`` lists indices or header names; without it every current or voltage
    channel is watched and the others (temperature, pressure, position) are skipped. What was
    left out, and why, becomes a note on the file.
    """
    if fm.status != "ok" or not fm.channels:
        return fm
    chosen = rig.channels
    keep: list[ChannelMeasures] = []
    not_listed: list[str] = []
    not_electrical: list[str] = []
    found: set[int | str] = set()
    for ch in fm.channels:
        if chosen is None:
            watched = ch.dimension in ("A", "V")
        else:
            hits = {k for k in chosen if k == ch.index or k == ch.name}
            found |= hits
            watched = bool(hits)
        if not watched:
            (not_listed if chosen is not None else not_electrical).append(_label(ch))
            continue
        shown = rig.channel_name(ch.index, ch.name)
        if shown and shown != ch.name:
            ch = replace(ch, name=shown, notes=ch.notes + (
                f"shown as {shown!r} (the rig's channel_names); header name {ch.name!r}",))
        keep.append(ch)
    notes = list(fm.notes)
    if not_electrical:
        notes.append(f"channel{'s' if len(not_electrical) > 1 else ''} "
                     f"{', '.join(not_electrical)} not watched: the unit is neither a current "
                     f"nor a voltage (list the channel in the rig's channels to watch it)")
    if not_listed:
        notes.append(f"channel{'s' if len(not_listed) > 1 else ''} {', '.join(not_listed)} "
                     f"not watched: not in the rig's channels")
    missing = [k for k in (chosen or ()) if k not in found]
    if missing:
        notes.append("the rig's channels list " + ", ".join(repr(k) for k in missing)
                     + ", which this file does not have")
    if tuple(keep) == fm.channels and len(notes) == len(fm.notes):
        return fm
    return replace(fm, channels=tuple(keep), notes=tuple(notes))


def in_rig_zone(fm: FileMeasures, rig: RigConfig) -> FileMeasures:
    """A header time without a zone is the acquisition PC's clock: read it in the rig's zone
    (``RigConfig.timezone``, else this computer's), so the store holds true UTC."""
    t = fm.recorded_at
    if isinstance(t, datetime) and t.tzinfo is None:
        return replace(fm, recorded_at=localize(t, rig.timezone))
    return fm


def judge_file(fm: FileMeasures, rig: RigConfig, store: Store, rules: Rules, now: float,
               states: dict[str, dict] | None = None) -> list[Finding]:
    """The judge with the rig's history bound to the store (files recorded before this one)
    and the rig's open history alerts (one alert per measure and side: qcd.judge.judge).
    ``states``: the rig's alert states as stored (``Store.alert_states``) when the caller
    has read them already."""
    st = rules.settings
    name, before = rig.name, file_time(fm.recorded_at, fm.mtime, now)
    stored = store.charts(name, fm.mode) if fm.status == "ok" else {}
    open_alerts: set[tuple[str, int, str, str]] = set()
    if fm.status == "ok":
        held = {r.name for r in rules.history}
        if states is None:
            states = store.alert_states(name)
        open_alerts = {(a["mode"], a["channel"], a["measure"], a["rule"])
                       for a in states.values()
                       if a["rule"] in held and a["state"] not in ("ok", "suspect")}
    starts: dict[tuple[int, str], float] = {}
    for (_, ch, measure, _), row in stored.items():        # a re-learn: history starts again
        if row["start_at"] is not None:
            starts[(ch, measure)] = max(starts.get((ch, measure), -math.inf), row["start_at"])

    def history(mode: str, channel: int, measure: str, *, clean_files: bool = False
                ) -> list[tuple[float, float]]:
        return store.history(name, mode, channel, measure, limit=st.history_files,
                             days=st.history_days, before=before,
                             after=starts.get((channel, measure)), clean_files=clean_files)

    learned: dict[tuple, tuple[list, list]] = {}
    readmitted: dict[tuple, list] = {}

    def learning_rows(store: Store, rig: str, mode: str, channel: int, measure: str,
                      st: RuleSettings, at: float, start_at: float | None, log: bool
                      ) -> list[tuple[float, float]]:
        key = (mode, channel, measure, start_at)
        if key not in learned:
            learned[key] = _learning_rows(store, rig, mode, channel, measure, st, at, start_at)
        if key + (log,) not in readmitted:
            readmitted[key + (log,)] = _readmitted(learned[key], log)
        return readmitted[key + (log,)]

    def charts(mode: str, channel: int, measure: str, rule: HistoryRule) -> ChartInput | None:
        row = stored.get((mode, channel, measure, rule.name)) or {}
        return chart_input(store, name, mode, channel, measure, rule, st, before,
                           row.get("start_at", starts.get((channel, measure))),
                           row.get("state"), row.get("ref"), learning_rows)
    return judge(fm, name, history, rules, now, charts, open_alerts)


def chart_input(store: Store, rig: str, mode: str, channel: int, measure: str,
                rule: HistoryRule, st: RuleSettings, at: float, start_at: float | None,
                state: dict | None, ref: dict | None,
                learning_rows: Callable[..., list[tuple[float, float]]] | None = None
                ) -> ChartInput | None:
    """The reference and the chart of one rule just before a file recorded ``at``.

    The reference: the stored one (fixed once learned); while there is none, learned from the
    good, unflagged files recorded since ``start_at`` (qcd.history.learn); with
    ``follow_days``, from the good files older than the guard gap. The chart is stepped through
    stored files it has not seen yet, in recording order; a file recorded before the chart's
    latest (a backlog) gets the chart as it stood at its time, and the later files are stepped
    through again after it (``ChartInput.tail``). None: the file lies before the chart's start.
    ``learning_rows``: ``_rows_to_learn`` or a caller's memo of it (the rules of one measure
    learn from the same files; those of one scale, log or not, from the same rows).
    """
    reference = Reference.from_dict(ref)
    if st.follow_days > 0:
        rows = store.history(rig, mode, channel, measure,
                             limit=max(4 * st.reference_files, 400), days=math.inf,
                             before=at - st.follow_days * 86400.0, after=start_at,
                             skip=st.follow_files)
        followed = history.follow(rows, files=st.reference_files, days=st.reference_days,
                                  log=rule.log, min_spread=rule.min_spread,
                                  margin=st.reference_margin, rule=rule)
        reference = followed or reference
    if reference is None:
        rows = (learning_rows or _rows_to_learn)(store, rig, mode, channel, measure, st, at,
                                                 start_at, rule.log)
        reference = history.learn(rows, files=st.reference_files, days=st.reference_days,
                                  log=rule.log, min_spread=rule.min_spread,
                                  margin=st.reference_margin, rule=rule)
        learning = history.progress_text(rows, st.reference_files, st.reference_days)
        if reference is None:
            # only a step chart runs on a young rig's provisional reference, its limit
            # calibrated for the reference's few files and days and the provisional budget: a
            # few days say too little about the scale for a slow-drift chart's long memory
            young = None if not rule.step else history.provisional(
                rows, files=st.learning_files, log=rule.log, min_spread=rule.min_spread,
                margin=st.reference_margin, rule=rule, arl0=st.provisional_arl0_files,
                days=min(history.PROVISIONAL_DAYS, st.reference_days),
                before=at - history.PROVISIONAL_GUARD_DAYS * 86400.0)
            if young is None:
                return ChartInput(None, ChartState.from_dict(state), at, start_at=start_at,
                                  learning=learning)
            return _charted(store, rig, mode, channel, measure, rule, young, state, at,
                            start_at, learning)
        state = None          # charted again from the full reference's end, in its units
    return _charted(store, rig, mode, channel, measure, rule, reference, state, at, start_at)


def _learning_rows(store: Store, rig: str, mode: str, channel: int, measure: str,
                   st: RuleSettings, at: float, start_at: float | None
                   ) -> tuple[list[tuple[float, float]], list[tuple[float, float]]]:
    """(good unflagged rows, every row) recorded since ``start_at`` and before ``at``, oldest
    first, each at most 4 references long (at least 400): what a reference learns from."""
    limit = max(4 * st.reference_files, 400)
    flagged = store.learning_points(rig, mode, channel, measure, start=start_at, before=at,
                                    limit=limit)
    every = [(t, v) for t, v, _ in flagged]
    # oldest first (flagged_points), so the first row is the earliest
    if not any([g for _, _, g in flagged]) and (start_at is None or not every
                                                 or every[0][0] >= start_at):
        return every, every       # none flagged: the good rows are these (one query, not two)
    if len(flagged) < limit:      # every row since start_at is here: the good ones among them
        good = [(t, v) for t, v, g in flagged if not g and (start_at is None or t >= start_at)]
    else:
        good = store.reference_rows(rig, mode, channel, measure, start=start_at, before=at,
                                    limit=limit)
    if not good:
        return good, []
    return good, every


def _readmitted(learning: tuple[list, list], log: bool) -> list[tuple[float, float]]:
    """The rows a reference learns from, of ``_learning_rows``'s (good, every): the good ones,
    and the flagged files within their scatter come back (qcd.history.readmit)."""
    good, every = learning
    return history.readmit(every, good, log=log) if good else good


def _rows_to_learn(store: Store, rig: str, mode: str, channel: int, measure: str,
                   st: RuleSettings, at: float, start_at: float | None, log: bool
                   ) -> list[tuple[float, float]]:
    """``_readmitted(_learning_rows(...), log)``: what one rule's reference learns from."""
    return _readmitted(_learning_rows(store, rig, mode, channel, measure, st, at, start_at),
                       log)


def _charted(store: Store, rig: str, mode: str, channel: int, measure: str, rule: HistoryRule,
             reference: Reference, state: dict | None, at: float, start_at: float | None,
             learning: str = "") -> ChartInput | None:
    chart = ChartState.from_dict(state)
    if chart.since is None and chart.last_at is None:
        chart = ChartState(since=reference.last_at, last_at=None)   # charts after the reference
    since = chart.since
    if since is not None and at <= since:
        return None
    latest = chart.last_at if chart.last_at is not None else since
    tail: list[tuple[float, float]] = []
    if latest is not None and at < latest:                # a backlog file: replay around it
        tail = store.chart_points(rig, mode, channel, measure, after=at)
        chart = ChartState(since=since)
        latest = since
    before = store.chart_points(rig, mode, channel, measure, after=latest, before=at)
    chart = replay(rule, chart, before, reference)
    return ChartInput(reference, chart, at, tuple(tail), start_at=start_at, learning=learning,
                      provisional=bool(learning))


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


def _superseded_episodes(store: Store, rig: str, fm: FileMeasures, states: dict[str, dict]
                         ) -> dict[str, dict]:
    """``states`` with every alert opened by this path's earlier row alone (a file measured
    while it was still being written, now measured again with new content) set to resolve
    on this file's first clear value: a superseded row's findings do not hold an alert open
    for resolve_after_files more files."""
    old = store.file_state(rig, fm.path)
    if old is None or old.sha256 == fm.sha256 or not states:
        return states
    shown = printable(fm.path)
    out = dict(states)
    for key, st in states.items():
        if st.get("path") == shown and st.get("bad_files") == 1 and \
                st.get("machine", st.get("state")) == "open":
            out[key] = {**st, "clear_run": max(0, int(st.get("resolve_after_files") or 1) - 1)}
    return out


def _end_resolved_mutes(store: Store, now: float) -> None:
    """End 'until resolved' mutes once every alert they muted has resolved."""
    open_ended = [s for s in store.active_mutes(now) if s.end_at is None]
    if not open_ended:
        return
    states = store.alert_states().values()
    for mute in open_ended:
        used = any(mute.id in (st.get("spent") or []) for st in states)
        live = any(mute.id in (st.get("mutes") or []) for st in states)
        if used and not live:
            store.end_mute(mute.id, now)
            log.info("mute %s (%s) ended: its alerts resolved", mute.id, mute.reason)


def _charts_after(findings: list[Finding], before: dict[str, dict],
                  after: dict[str, alerts.AlertState], at: float) -> list[dict]:
    """The drift charts to store after a file: as the judge stepped them, and started again
    (``charts.reset``) where this file resolved the chart's alert."""
    out = []
    for f in findings:
        if f.chart is None:
            continue
        row = dict(f.chart)
        s = after.get(f.key)
        if s is not None and s.state == "ok" and before.get(f.key, {}).get("state") == "open" \
                and row.get("ref") is not None:
            row["state"] = reset(ChartState.from_dict(row["state"]), at).to_dict()
        out.append(row)
    return out


def relearn(store: Store, rules: Rules, rig: str, at: float, now: float, *,
            measures: Iterable[str] | None = None, channel: int | None = None,
            why: str = "", sender: Sender | None = None,
            zones: dict[str, str | None] | None = None) -> tuple[list[tuple], list[str]]:
    """Accept a rig's new normal: the references of its drift charts (of ``measures`` /
    ``channel``, else all) learn again from files recorded at or after ``at``; the open
    history alerts on those keys resolve with a message saying why; a logbook note (kind
    'relearn') marks it on the trend plots. Returns (chart keys, resolved alert keys).

    An alert that resolves by itself never re-learns: only this call does.
    """
    history_rules = {r.name: r for r in rules.history}
    wanted = None if measures is None else set(measures)
    keys = []
    for mode_key in {(a["mode"], a["channel"], a["measure"], a["rule"])
                     for a in store.alert_states(rig).values()}:
        mode, ch, measure, rule = mode_key
        if rule in history_rules and history_rules[rule].test in ("ewma", "cusum"):
            keys.append((mode, int(ch), measure, rule))
    when = datetime.fromtimestamp(at, timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    reason = (f"the rig's normal is re-learned from files recorded from {when}"
              + (f" ({why})" if why else ""))
    with store.transaction():     # alert states read and written with no other writer between
        charts = store.relearn(rig, at, measures=wanted, channel=channel, keys=keys, now=now)
        what = ", ".join(sorted({m for _, _, m, _ in charts})) or "nothing stored yet"
        states = store.alert_states(rig)
        resolve_keys = [k for k, st in states.items()
                        if st.get("rule") in history_rules
                        and (wanted is None or st.get("measure") in wanted)
                        and (channel is None or st.get("channel") == channel)
                        and st.get("state") not in ("ok", None)]
        after, messages = alerts.resolve(states, resolve_keys, now, reason, zones=zones)
        changed = _changed(states, after)
        store.add_note(rig, f"re-learn of {what}" + (f": {why}" if why else ""), at,
                       kind="relearn", now=now)
        if changed or messages:
            store.commit_alerts(changed, messages, now=now)
    _deliver(store, sender, now)
    return charts, resolve_keys


def commit(fm: FileMeasures, rig: RigConfig, store: Store, rules: Rules, now: float,
           sender: Sender | None = None, *, batch: bool = False) -> FileMeasures:
    """Judge a measured file, advance its rig's alerts and store it all in one transaction.

    Never raises for a bad file; a StoreError (the database itself failing) propagates.
    With ``batch`` no message is queued per file (see ``flush_digest``).
    """
    with store.transaction():     # alert states read and written with no other writer between
        fm = _commit(fm, rig, store, rules, now, batch=batch)
    _deliver(store, sender, now)             # also retries rows still pending
    return fm


def _commit(fm: FileMeasures, rig: RigConfig, store: Store, rules: Rules, now: float, *,
            batch: bool = False) -> FileMeasures:
    name = rig.name
    fm = in_rig_zone(fm, rig)
    first = store.same_content(name, fm.sha256)
    if first is not None and not (first["status"] == "error" and fm.status == "ok"):
        # content already stored (a copy, or the same file touched): not judged again
        store.commit_file(name, fm, analysed_at=now)
        if first["status"] == "ok" and store.file_state(name, fm.path).id != first["id"]:
            return replace(fm, status="skipped", error_kind=None,
                           error=f"{printable(fm.path)}: same content as {first['path']}, "
                                 f"not measured again")
        return fm
    try:
        before = store.alert_states(name)
        findings = judge_file(fm, rig, store, rules, now, before)
        states, messages = alerts.advance(_superseded_episodes(store, name, fm, before),
                                          findings, store.active_mutes(now), now,
                                          rules.settings, batch=batch,
                                          zones={name: rig.timezone})
        changed = _changed(before, states)
        charts = _charts_after(findings, before, states, file_time(fm.recorded_at, fm.mtime,
                                                                     now))
    except StoreError:
        raise
    except Exception as e:
        log.exception("judging %s", fm.path)
        fm = replace(fm, status="error", error_kind="internal",
                     error=f"{fm.path}: internal error while judging ({type(e).__name__}: {e})")
        findings, changed, messages, charts = [], [], [], []
    store.commit_file(name, fm, analysed_at=now, findings=findings, alert_states=changed,
                      messages=messages, charts=charts)
    if changed:
        _end_resolved_mutes(store, now)
    return fm


def process(path: str | os.PathLike, rig: RigConfig, store: Store, rules: Rules, now: float, *,
            sender: Sender | None = None, batch: bool = False) -> FileMeasures:
    """``measure`` one file and ``commit`` it."""
    return commit(measure(path, rig), rig, store, rules, now, sender, batch=batch)


def flush_digest(store: Store, rules: Rules, now: float, sender: Sender | None = None, *,
                 zones: dict[str, str | None] | None = None) -> alerts.Message | None:
    """After a backlog: one digest of what opened and resolved, queued with its states."""
    with store.transaction():
        before = store.alert_states()
        states, message = alerts.flush_digest(before, store.active_mutes(now), now,
                                              rules.settings, zones=zones)
        changed = _changed(before, states)
        if changed or message is not None:
            store.commit_alerts(changed, [message] if message is not None else [], now=now)
    if message is not None:
        _deliver(store, sender, now)
    return message


def tick(store: Store, rules: Rules, now: float, sender: Sender | None = None, *,
         zones: dict[str, str | None] | None = None) -> list[alerts.Message]:
    """No new file: one message per rig for open alerts whose mute has just ended."""
    with store.transaction():
        before = store.alert_states()
        states, messages = alerts.tick(before, store.active_mutes(now), now, rules.settings,
                                       zones=zones)
        changed = _changed(before, states)
        if changed or messages:
            store.commit_alerts(changed, messages, now=now)
    if messages:
        _deliver(store, sender, now)
    return messages


def _opened(path: Path) -> tuple[tuple[float, str], Recording | None]:
    """(sort key, the file's header to measure from, or None).

    The key is the header time, else the mtime, then the name; a file that cannot be opened
    sorts by its mtime and ``measure`` stores what is wrong with it. A header that can go to
    a measuring process as it is (``intake.carried``) is kept; ``measure`` closes it.
    """
    from qcd.intake import carried
    from qcd.recording import open_recording
    try:
        rec = open_recording(path)
    except Exception:                        # a bad file is measured (and reported) later
        return _by_mtime(path), None
    when = rec.recorded_at
    rec = carried(rec)
    if when is not None:
        return (file_time(when), os.fspath(path)), rec
    return _by_mtime(path), rec


def _by_mtime(path: Path) -> tuple[float, str]:
    try:
        return path.stat().st_mtime, os.fspath(path)
    except OSError:
        return 0.0, os.fspath(path)


def order_key(path: str | os.PathLike) -> tuple[float, str]:
    """The recording-order key of one file (header time, else mtime; then the path); the
    header is read and dropped, so a caller can order many files in little memory."""
    return _opened(Path(path))[0]


def _in_order(paths: Iterable[str | os.PathLike]) -> list[tuple[Path, Recording | None]]:
    opened = [(Path(p), _opened(Path(p))) for p in paths]
    return [(p, rec) for p, (_, rec) in sorted(opened, key=lambda x: x[1][0])]


def recording_order(paths: Iterable[str | os.PathLike]) -> list[Path]:
    """Files sorted by recording time (header, else mtime), then by name."""
    return [p for p, _ in _in_order(paths)]


@dataclass
class ScanResult:
    files: list[FileMeasures] = field(default_factory=list)
    opened: list[dict] = field(default_factory=list)      # alert rows that opened in this scan
    digest: alerts.Message | None = None                    # the digest Message, if any
    outbox: dict[str, int] = field(default_factory=dict)
    learning: dict[str, int] = field(default_factory=dict)  # mode -> good files, still learning
    count: int = 0                                          # files committed
    failed: list[FileMeasures] = field(default_factory=list)  # the error files among them


def measure_all(paths: list[Path], rig: RigConfig, workers: int = 1, *, digest: bool = True,
                headers: list[Recording | None] | None = None) -> Iterator[FileMeasures]:
    """``measure`` each file, in ``workers`` processes (qcd.workers), results in ``paths`` order."""
    headers = headers or [None] * len(paths)

    def crashed(i: int, reason: str) -> FileMeasures:
        return error_file(paths[i], "internal", f"{os.fspath(paths[i])}: {reason}",
                          **_facts(paths[i], digest))
    return imap(_measure_job, [(p, rig, h, digest) for p, h in zip(paths, headers)], workers,
                on_crash=crashed)


def _measure_job(path: Path, rig: RigConfig, recording: Recording | None, digest: bool
                 ) -> FileMeasures:
    return measure(path, rig, recording=recording, digest=digest)


def scan(paths: Iterable[str | os.PathLike], rig: RigConfig, store: Store, rules: Rules, *,
         clock: Callable[[], float], sender: Sender | None = None,
         on_file: Callable[[FileMeasures], None] | None = None, batch: bool | None = None,
         workers: int = 1,
         measured: Callable[[list], Iterable[FileMeasures]] | None = None,
         keep_files: bool = True) -> ScanResult:
    """``qcd scan --store``: measure -> store -> judge -> alerts -> delivery, in recording order.

    ``workers`` > 1 measures in that many processes; every result is committed here, in
    recording order, through this one writer. ``batch`` (default: more than DIGEST_FILES
    files) ends with one digest instead of one message per file. ``measured`` (qcd.cluster):
    ``paths`` are already in recording order and it yields their FileMeasures in that order;
    without ``keep_files`` only the error files are kept in the result (``count`` counts all).
    """
    if measured is None:
        # stored as absolute, resolved paths: the service finds them under its (resolved) folders
        ordered = _in_order(Path(os.path.realpath(p)) for p in paths)
        files = [p for p, _ in ordered]
        results = measure_all(files, rig, workers, headers=[rec for _, rec in ordered])
    else:
        files = paths if isinstance(paths, list) else list(paths)
        results = measured(files)
    batch = len(files) > DIGEST_FILES if batch is None else batch
    name = rig.name
    was_open = {a["key"] for a in store.open_alerts(name)}
    out = ScanResult()
    modes: set[str] = set()
    for fm in results:
        fm = commit(fm, rig, store, rules, clock(), None if batch else sender, batch=batch)
        out.count += 1
        if fm.status == "ok":
            modes.add(fm.mode)
        else:
            out.failed.append(fm)
        if keep_files:
            out.files.append(fm)
        if on_file is not None:
            on_file(fm)
    if batch:
        out.digest = flush_digest(store, rules, clock(), sender)
    elif sender is not None:
        _deliver(store, sender, clock())
    out.opened = [a for a in store.open_alerts(name) if a["key"] not in was_open]
    out.outbox = store.outbox_counts()
    for mode in sorted(modes):
        n = store.good_file_count(name, mode)
        if n < rules.settings.learning_files:
            out.learning[mode] = n
    return out
