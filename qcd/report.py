"""The morning report, trends and the alerts list from the store: plain data, then terminal
text, JSON and one self-contained HTML page (qcd.html).

``build_report``, ``trend_rows`` and ``build_alerts`` are the only functions that read the
store (its read queries only); everything rendered, JSON included, comes from what they return.
Imports qcd.results, qcd.html, qcd.config (durations, redaction), qcd.errors,
qcd.measures.noise (the MAD scale) and numpy; the Store it is given. Over 500 lines: the three
listings people read (report, trend, alerts) share their data and formatting.
"""
from __future__ import annotations

import csv
import fnmatch
import html
import io
import math
import re
from dataclasses import asdict, dataclass, field, replace
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any, Iterable

import numpy as np

from qcd.alerts import Mute
from qcd.config import parse_duration, redact_text
from qcd.errors import ConfigError
from qcd.html import Curve, Panel, page, spectra_figure, trend_figure
from qcd.measures.noise import MAD_SCALE
from qcd.results import MEASURES, SAFETY_NOTE, Spectrum, file_time, shown
from qcd.units import pretty_unit, readable, readable_unit
from qcd.zones import get_zone, local_text, local_time, zone_name

if TYPE_CHECKING:
    from qcd.store import Store

__all__ = ["KEY_MEASURES", "MeasureLine", "Trend", "LatestSpectrum", "RigReport", "Report",
           "parse_since", "normal_range", "build_report", "render_text", "render_html",
           "trend_rows", "render_trend_text", "render_trend_csv", "sparkline", "AlertList",
           "build_alerts", "render_alerts", "note_line", "RigSummary", "summarize",
           "summary_line", "alert_meaning", "reference_band", "BAND_TEXT", "short_hint"]

# The measures the morning report shows, in this order, when a rig has them, and the ones plotted.
KEY_MEASURES = shown("report")
_PLOTTED = shown("plot")
NORMAL_SPREADS = 3.0        # reference band = median +- 3 robust SD (1.4826 MAD)
# What the reference band is, said in the report's header (keep with reference_band()).
BAND_TEXT = (f"reference band = the drift charts' reference: median \u00b1 {NORMAL_SPREADS:g} "
             f"robust SD of the reference files each plot names (on log values for positive "
             f"measures); before a reference is learned, median \u00b1 {NORMAL_SPREADS:g} robust "
             f"SD (1.4826 MAD) of the rig's unflagged files of the last 30 days; a value is "
             f"high or low when qcd's rules flagged it")
HISTORY_DAYS = 30.0
_SPARKS = "\u2581\u2582\u2583\u2584\u2585\u2586\u2587\u2588"


def _is_grounding(hint: str) -> bool:
    return bool(re.search(r"ground|earth|mains|hum", hint, re.I))


def parse_since(text: str, now: float, zone: str | None = None) -> float:
    """'18h', '3d', '90m', '2w' (``parse_duration``) or an ISO date/time (in ``zone``, the
    lab's, when it names none; None: this computer's zone) -> Unix seconds."""
    t = str(text).strip()
    try:
        return now - parse_duration(t, "--since")
    except ConfigError:
        pass
    try:
        dt = datetime.fromisoformat(t)
    except ValueError:
        raise ConfigError(None, "--since", f"expected an age such as 18h, 3d, 90m or an ISO "
                                           f"date such as 2026-11-03, got {text!r}") from None
    if dt.tzinfo is None:
        z = get_zone(zone)
        dt = dt.astimezone() if z is None else dt.replace(tzinfo=z)
    return dt.timestamp()


def normal_range(values: Iterable[float]) -> tuple[float, float, int] | None:
    """(median, robust SD = 1.4826 MAD, n) of a history; None when empty.

    Robust z as in Iglewicz & Hoaglin 1993 / Rousseeuw & Croux 1993 (docs/methods.md §7).
    """
    v = np.asarray([x for x in values if x is not None and math.isfinite(x)], dtype=float)
    if v.size == 0:
        return None
    med = float(np.median(v))
    return med, MAD_SCALE * float(np.median(np.abs(v - med))), int(v.size)


@dataclass(frozen=True)
class MeasureLine:
    measure: str
    channel: int
    unit: str
    latest: float | None
    latest_at: float | None
    median: float | None
    spread: float | None       # robust SD of the rig's history
    low: float | None
    high: float | None
    n_history: int
    state: str                 # 'normal' | 'high' | 'low' | 'no history'
    channel_name: str = ""


@dataclass(frozen=True)
class Trend:
    """A key measure's stored values over the history window, for the trend plots."""
    measure: str
    channel: int
    unit: str
    points: tuple[tuple[float, float, bool], ...]    # (recorded_at, value, flagged), oldest first
    alerts_opened: tuple[float, ...] = ()
    channel_name: str = ""
    band: tuple[float, float, float] | None = None   # (low, median, high) the plot shades
    band_label: str = ""       # what the band is: the drift charts' reference, else normal range


@dataclass(frozen=True)
class LatestSpectrum:
    """The rig's latest baseline spectrum, its reference (median of recent good files) and the
    mains line to mark."""
    path: str
    channel: int
    spectrum: Spectrum
    reference: Spectrum | None
    line_hz: float | None


@dataclass(frozen=True)
class RigReport:
    rig: str
    n_files: int
    n_ok: int
    n_error: int
    n_flagged: int
    files: tuple[dict, ...]
    measures: tuple[MeasureLine, ...]
    open_alerts: tuple[dict, ...]
    hints: tuple[str, ...]
    safety_note: str | None
    mutes: tuple[dict, ...] = ()         # active mutes matching the rig
    resolved_alerts: tuple[dict, ...] = ()   # alerts that resolved within the period
    trends: tuple[Trend, ...] = ()       # the plotted key measures (at most six)
    spectrum: LatestSpectrum | None = None
    channels: tuple[tuple[int, str], ...] = ()   # (channel, name) of the rig's recent files
    notes: tuple[dict, ...] = ()         # logbook notes (at, text, kind) of the trend window
    timezone: str | None = None          # the rig's IANA zone (None: this computer's)
    zone_label: str = ""                 # the zone as shown ('America/Los_Angeles')
    odd_times: tuple[dict, ...] = ()     # files of the period whose recorded time is not trusted


@dataclass(frozen=True)
class RigSummary:
    """One line of the report's summary: a rig's state, what moved and the hint."""
    rig: str
    state: str                 # 'alert' | 'errors' | 'flagged' | 'out of normal' | 'ok' | 'idle'
    severity: int              # higher is worse; the summary is sorted by it
    changes: tuple[str, ...]   # 'mains hum RMS up 3.1x its normal, channel 0 (IN 0)'
    hint: str
    n_files: int


@dataclass(frozen=True)
class Report:
    generated_at: float
    since: float
    rigs: tuple[RigReport, ...]
    outbox: dict = field(default_factory=dict)
    timezone: str | None = None          # the lab's IANA zone (None: this computer's)
    zone_label: str = ""
    summary: tuple[RigSummary, ...] = ()     # one per rig, worst first (rigs in this order)

    def to_json(self) -> dict[str, Any]:
        return asdict(self)


# A recorded time before 1990 is an acquisition PC's clock reset (to the 1980 or 1970 epoch of
# its file system or system clock, common practice); one more than a day after the file was
# measured is a clock set ahead. Such files are counted by when they were measured.
TRUST_FROM = 631152000.0                 # 1990-01-01 00:00 UTC
_SOURCES = {"header": "header", "header_tz": "header", "mtime": "file's modification time",
            "analysed": "time measured"}


def _file_time(f: dict) -> float:
    return file_time(f.get("recorded_at"), f.get("mtime"), 0.0)


def _series(store: Store, rig: str, measure: str, channel: int | None, since: float | None
            ) -> list[tuple]:
    rows = store.measure_series(rig, measure, channel=channel, since=since)
    return sorted(rows, key=lambda r: (r[0] if r[0] is not None else 0.0))


def reference_band(history: list[float]) -> tuple[float, float, float, float, int] | None:
    """THE source of the report's band (table column, trend-plot shading, BAND_TEXT):
    (low, median, high, robust SD, n) of a measure's unflagged history, None below 3 values.

    Only the band's drawing comes from here; high/low comes from the judge's stored flag.
    """
    nr = normal_range(history)
    if nr is None or nr[2] < 3:
        return None
    med, sd, n = nr
    lo, hi = med - NORMAL_SPREADS * sd, med + NORMAL_SPREADS * sd
    if min(history) >= 0.0:               # a measure that cannot be negative
        lo = max(lo, 0.0)
    return lo, med, hi, sd, n


def _measure_line(rows: list[tuple], measure: str, channel: int) -> MeasureLine:
    """The latest of ``rows`` (a measure's series, oldest first) against the ones before.

    Its state is the judge's: 'high'/'low' (by side of the median) exactly when the stored
    file flagged this measure, else 'normal' ('no history' before there is a band)."""
    t, value, unit, flagged = rows[-1][0], rows[-1][1], rows[-1][2], bool(rows[-1][3])
    history = [r[1] for r in rows[:-1] if not r[3]]       # unflagged, before the latest
    band = reference_band(history)
    nr = normal_range(history)
    med = band[1] if band else (nr[0] if nr else None)
    if flagged:
        state = "low" if med is not None and value < med else "high"
    else:
        state = "normal" if band is not None else "no history"
    if band is None:
        return MeasureLine(measure, channel, unit, value, t, med, nr[1] if nr else None,
                           None, None, nr[2] if nr else 0, state)
    lo, med, hi, sd, n = band
    return MeasureLine(measure, channel, unit, value, t, med, sd, lo, hi, n, state)


def _flag_text(fd: dict) -> str:
    """'seal_resistance 0.274 GOhm (gigaseal: below 1 GOhm)' for one bad finding."""
    v = fd.get("value")
    value = f" {readable(v, fd.get('unit') or '')}" if isinstance(v, (int, float)) else ""
    limit = fd.get("limit_text") or ""
    limit = limit.split(";")[0] if fd.get("kind") != "limit" else limit
    return f"{fd.get('measure')}{value} ({fd.get('rule')}: {limit})" if limit else \
        f"{fd.get('measure')}{value} ({fd.get('rule')})"


def _clauses(hint: str) -> frozenset[str]:
    body = hint.split(":", 1)[1] if hint.lower().startswith("possible source") else hint
    return frozenset(c.strip().rstrip(".") for c in body.split(";") if c.strip())


def _add_hint(hints: list[str], hint: str) -> None:
    """Keep one hint per set of suggested checks (the same checks in another order are one)."""
    new = _clauses(hint)
    for i, old in enumerate(hints):
        have = _clauses(old)
        if new <= have:
            return
        if have < new:
            hints[i] = hint
            return
    hints.append(hint)


def _key_measures(store: Store, rig: str, now: float, opened: list[dict],
                  names: dict[int, str]) -> tuple[list[MeasureLine], list[Trend]]:
    """Each key measure per watched channel (the first four) against its normal range, and
    the series of the first six plotted ones with their alert openings."""
    t0 = now - HISTORY_DAYS * 86400.0
    lines, trends = [], []
    refs = store.charts(rig)
    for measure in KEY_MEASURES:
        for ch in list(names)[:4]:
            rows = _series(store, rig, measure, ch, t0)
            if not rows:
                continue
            ml = replace(_measure_line(rows, measure, ch), channel_name=names[ch])
            band, label = _reference_band(refs, ch, measure)
            if band is not None:            # one band everywhere: the drift charts' reference
                ml = replace(ml, low=band[0], median=band[1], high=band[2])
            elif ml.low is not None:
                band, label = (ml.low, ml.median, ml.high), \
                    f"recent files (median +- {NORMAL_SPREADS:g} robust SD, no reference yet)"
            lines.append(ml)
            if measure in _PLOTTED and len(trends) < 6:
                marks = sorted({a["opened_at"] for a in opened if a.get("opened_at")
                                and a.get("measure") == measure
                                and a.get("channel") in (None, ch)})
                trends.append(Trend(measure, ch, ml.unit,
                                    tuple((r[0], r[1], bool(r[3])) for r in rows), tuple(marks),
                                    names[ch], band, label))
    return lines, trends


def _reference_band(refs: dict[tuple, dict], channel: int, measure: str
                    ) -> tuple[tuple[float, float, float] | None, str]:
    """The drift charts' reference of a (channel, measure) as a band: median and +-3 robust SD
    (on the log scale for a log reference), and its label naming the reference files' days;
    (None, '') when no chart of it has a learned reference."""
    from qcd.charts import Reference, span_text
    found = [(row.get("updated_at") or 0.0, row["ref"]) for (mode, ch, m, rule), row
             in refs.items() if ch == channel and m == measure and row.get("ref")]
    if not found:
        return None, ""
    ref = Reference.from_dict(max(found, key=lambda x: x[0])[1])
    c, w = ref.center, NORMAL_SPREADS * ref.scale
    band = (math.exp(c - w), math.exp(c), math.exp(c + w)) if ref.log else (c - w, c, c + w)
    return band, f"reference {span_text(ref)} ({ref.n} files, +-{NORMAL_SPREADS:g} robust SD)"


def _latest_spectrum(store: Store, rig: str, files: list[dict], now: float
                     ) -> LatestSpectrum | None:
    """Channel 0's spectrum of the period's latest good file (else of the latest stored one)."""
    t0 = now - HISTORY_DAYS * 86400.0
    ok = [f for f in files if f.get("status") == "ok"]
    latest = ok[-1] if ok else None
    if latest is None:
        rows = _series(store, rig, "noise_rms", 0, t0)
        if not rows:
            return None
        latest = {"id": rows[-1][4], "path": rows[-1][5], "mode": None,
                  "recorded_at": rows[-1][0]}
    spec = store.spectrum(latest["id"], 0)
    if spec is None or not len(spec.freqs_hz):
        return None
    ref = store.reference_spectrum(rig, latest.get("mode") or "unknown", 0,
                                   before=_file_time(latest))
    line = _series(store, rig, "line_hz", 0, t0)
    return LatestSpectrum(str(latest.get("path") or ""), 0, spec, ref,
                          float(line[-1][1]) if line else None)


def build_report(store: Store, now: float, since: float, rigs: Iterable[str] | None = None,
                 *, zones: dict[str, str | None] | None = None, lab_zone: str | None = None
                 ) -> Report:
    """Per rig: the period's files, each key measure against its normal range, open alerts,
    the noise-source hints of the period's findings, and what the page plots.

    Times stay Unix seconds; ``zones`` (rig -> IANA zone) and ``lab_zone`` (the rest; None:
    this computer's zone) say in which zone the text and page show them."""
    zones = zones or {}
    names = list(rigs) if rigs else list(store.rigs())
    out = []
    for rig in names:
        files = sorted(store.files(rig=rig, since=since, until=None, or_analysed=True),
                       key=_file_time)          # recorded or measured in the period
        files = [f for f in files if not f.get("superseded")]
        odd = store.files_measured_with_odd_times(rig, since, trust_from=TRUST_FROM)
        seen = {f["id"] for f in files}
        files += [f for f in odd if f["id"] not in seen]      # measured in the period
        odd_times = tuple({"id": f["id"], "path": f.get("path"), "recorded_at":
                           f.get("recorded_at"), "analysed_at": f.get("analysed_at"),
                           "time_source": f.get("time_source")} for f in odd)
        hints: list[str] = []
        flags: dict[int, list[str]] = {}
        for f in files:
            for fd in store.findings(f["id"]):
                if not fd.get("bad"):
                    continue
                flags.setdefault(f["id"], []).append(_flag_text(fd))
                h = fd.get("hint")
                if h:
                    _add_hint(hints, h.replace(SAFETY_NOTE, "").strip())
        alerts = tuple(store.open_alerts(rig=rig))
        names = store.channel_names(rig, now - HISTORY_DAYS * 86400.0)
        lines, trends = _key_measures(store, rig, now, list(alerts) + list(
            store.recent_alerts(now - HISTORY_DAYS * 86400.0, rig=rig)), names)
        mutes = tuple({"rig_glob": x.rig_glob, "rule_glob": x.rule_glob,
                          "start_at": x.start_at, "end_at": x.end_at, "reason": x.reason}
                         for x in store.active_mutes(now) if fnmatch.fnmatchcase(rig, x.rig_glob))
        slim = tuple(dict({k: f.get(k) for k in ("id", "path", "recorded_at", "mtime", "status",
                                                 "error_kind", "error", "mode", "flagged")},
                          flags=tuple(dict.fromkeys(flags.get(f["id"], ()))))
                     for f in files)
        resolved = tuple(dict(a) for a in store.recent_alerts(since, rig=rig))
        out.append(RigReport(
            rig, len(files), sum(f.get("status") == "ok" for f in files),
            sum(f.get("status") == "error" for f in files),
            sum(bool(f.get("flagged")) for f in files), slim, tuple(lines),
            tuple(dict(a) for a in alerts), tuple(hints),
            SAFETY_NOTE if any(_is_grounding(h) for h in hints) else None, mutes,
            resolved, tuple(trends), _latest_spectrum(store, rig, files, now),
            tuple(names.items()), tuple({k: n[k] for k in ("at", "text", "kind")} for n in
                                        store.notes(rig, since=now - HISTORY_DAYS * 86400.0,
                                                    until=now)),
            zones.get(rig, lab_zone), zone_name(zones.get(rig, lab_zone), now), odd_times))
    ranked = sorted(((summarize(x), x) for x in out), key=lambda p: (-p[0].severity, p[0].rig))
    return Report(now, since, tuple(x for _, x in ranked), dict(store.outbox_counts()),
                  lab_zone, zone_name(lab_zone, now), tuple(sm for sm, _ in ranked))


_SEVERITY = {"critical": 6, "warning": 5, "info": 4}


def alert_meaning(a: dict) -> str:
    """An alert by what it means: 'mains hum RMS up 3.1x its normal, channel 0 (IN 0)',
    'seal resistance below 1 GOhm, channel 0', 'files could not be read'."""
    d = a.get("details") or a
    measure = a.get("measure") or d.get("measure") or ""
    if measure == "file":
        return "files could not be read"
    info = MEASURES.get(measure)
    label = info.label if info else measure
    head = str(d.get("headline") or "")
    if d.get("kind") == "drift" or a.get("kind") == "drift":
        m = re.match(r"([0-9.eE+-]+)x its normal", head)
        if m:
            ratio = float(m.group(1))
            what = f"{'up' if ratio >= 1 else 'down'} {head}"
        elif head.startswith(("+", "-")):
            what = f"{'up' if head.startswith('+') else 'down'} {head.lstrip('+-')}"
        else:
            what = head or "away from its normal"
    else:
        what = head or str(d.get("limit_text") or a.get("rule") or "")
        what = what[3:] if what.startswith("is ") else what
    ch = a.get("channel")
    name = d.get("channel_name") or ""
    where = "" if ch in (None, "", -1) or " on channel" in what else \
        f", channel {ch}" + (f" ({name})" if name else "")
    return f"{label} {what}{where}".strip()


def short_hint(hint: str) -> str:
    """The check a hint suggests, in a few words: 'check the grounding' (the whole hint is in
    the rig's section)."""
    m = re.search(r"(?:^|[:;]\s*)check ([^;(.:]+)", hint)
    if m:
        return "check " + m.group(1).strip().rstrip(",")
    return hint if len(hint) <= 80 else hint[:79].rstrip() + "\u2026"


def summarize(rig: RigReport) -> RigSummary:
    """A rig's line of the summary: the worst of its open alerts (by severity), error files,
    flagged files and measures outside the normal band, in that order."""
    changes: list[str] = []
    sev = 0
    said: set[tuple] = set()               # (measure, channel) already named by an alert
    for a in rig.open_alerts:
        d = a.get("details") or {}
        sev = max(sev, _SEVERITY.get(str(d.get("severity") or "warning"), 5))
        if (a.get("measure"), a.get("channel")) not in said:
            changes.append(alert_meaning(a))
        said.add((a.get("measure"), a.get("channel")))
    state = "alert" if rig.open_alerts else ""
    if rig.n_error:
        sev = max(sev, 3)
        state = state or "errors"
        changes.append(f"{rig.n_error} file(s) could not be measured")
    if rig.n_flagged:
        sev = max(sev, 2)
        state = state or "flagged"
        if not rig.open_alerts:
            changes.append(f"{rig.n_flagged} flagged file(s)")
    moved = [m for m in rig.measures if m.state in ("high", "low")]
    if moved:
        sev = max(sev, 1)
        state = state or "out of normal"
        for m in moved:
            if (m.measure, m.channel) in said:
                continue
            info = MEASURES.get(m.measure)
            by = (f"{m.latest / m.median:.2g}x its median" if m.median and m.latest
                  and m.median > 0 and m.latest > 0 else f"{readable(m.latest, m.unit)}")
            name = f" ({m.channel_name})" if m.channel_name else ""
            text = (f"{info.label if info else m.measure} {m.state} ({by}), channel "
                    f"{m.channel}{name}")
            changes.append(text)
    if not state:
        state = "ok" if rig.n_files else "idle"
    hint = short_hint(rig.hints[0]) if rig.hints else ""
    return RigSummary(rig.rig, state, sev, tuple(dict.fromkeys(changes)), hint, rig.n_files)


# ----------------------------------------------------------------------------- terminal

def _num(v: float | None, width: int = 9) -> str:
    if v is None or not math.isfinite(v):
        return f"{'-':>{width}}"
    s = f"{v:.3g}"
    return f"{s:>{width}}"


def _when(t: float | None, zone: str | None = "UTC") -> str:
    """'2026-11-03 08:00 PST': the time in ``zone`` with the zone's abbreviation."""
    return local_text(t, zone)


def _mute_text(x: dict, zone: str | None = "UTC") -> str:
    until = "its alerts resolve" if x.get("end_at") is None else _when(x["end_at"], zone)
    rules = "" if x.get("rule_glob") in (None, "*") else f" (rules {x['rule_glob']})"
    why = f": {x['reason']}" if x.get("reason") else ""
    return f"muted until {until}{rules}{why}"


def _odd_times_lines(rig: RigReport) -> list[str]:
    """What the report says of files whose recorded time it could not trust."""
    if not rig.odd_times:
        return []
    out = [f"time not trusted: {len(rig.odd_times)} file(s) carry a recorded time before 1990 "
           f"or ahead of when they were measured (check the acquisition PC's clock); they are "
           f"counted by when they were measured:"]
    for f in rig.odd_times[:5]:
        out.append(f"  {f.get('path')}: {_when(f.get('recorded_at'), rig.timezone)} from the "
                   f"{_SOURCES.get(f.get('time_source'), 'file')}, measured "
                   f"{_when(f.get('analysed_at'), rig.timezone)}")
    if len(rig.odd_times) > 5:
        out.append(f"  ... and {len(rig.odd_times) - 5} more")
    return out


def render_text(r: Report) -> str:
    """The compact terminal report; every line fits 100 columns."""
    out = [f"qcd morning report, {_when(r.since, r.timezone)} to "
           f"{_when(r.generated_at, r.timezone)}", f"times in {r.zone_label or 'UTC'}",
           _wrap(BAND_TEXT, 100)]
    if not r.rigs:
        out.append("No rigs in the store yet.")
    if r.summary:
        out.append("")
        out.append("summary, worst first:")
        for i, sm in enumerate(r.summary, start=1):
            out.append(_wrap(f"  {i}. {summary_line(sm)}", 100))
    for rig in r.rigs:
        z = rig.timezone
        out.append("")
        out.append(f"== {rig.rig}: {rig.n_files} file(s), {rig.n_ok} ok, {rig.n_error} error, "
                   f"{rig.n_flagged} flagged")
        if rig.zone_label and rig.zone_label != r.zone_label:
            out.append(f"   times in {rig.zone_label}")
        for line in _odd_times_lines(rig):
            out.append(_wrap("   " + line, 100))
        if any(name for _, name in rig.channels):
            out.append(_wrap("   channels: " + _channels_text(rig.channels), 100))
        if rig.measures:
            out.append(f"   {'measure':<22}{'ch':>3} {'latest':>9} {'median':>9} "
                       f"{'reference band':>21} {'unit':<7}state")
            for m in rig.measures:
                unit, k = _line_unit(m)
                rng = (f"{_num(_times(m.low, k), 9).strip()} .. "
                       f"{_num(_times(m.high, k), 9).strip()}" if m.low is not None else "-")
                mark = {"high": "HIGH", "low": "LOW"}.get(m.state, m.state)
                out.append(f"   {m.measure:<22}{m.channel:>3} {_num(_times(m.latest, k))} "
                           f"{_num(_times(m.median, k))} {rng:>21} {unit:<7}{mark}")
        errs = [f for f in rig.files if f.get("status") == "error"]
        for f in errs[:5]:
            out.append(_wrap(f"   error: {f.get('error') or f.get('error_kind')}", 100))
        if len(errs) > 5:
            out.append(f"   ... and {len(errs) - 5} more errors")
        flagged = [f for f in rig.files if f.get("flags")]
        if len(flagged) > 3:
            out.append(f"   {len(flagged)} flagged files; the last 3:")
        for f in flagged[-3:]:
            short = dict.fromkeys(x.split(" (")[0] for x in f["flags"])
            out.append(_wrap(f"   flagged {_when(_file_time(f), z)} {_name(f.get('path'))}: "
                             + ", ".join(short), 100))
        if rig.open_alerts:
            out.append("   open alerts:")
            out += [_wrap(f"     - {alert_meaning(a)} since {_when(a.get('opened_at'), z)} "
                          f"(rule {a.get('rule')})", 100) for a in rig.open_alerts]
        else:
            out.append("   open alerts: none")
        if rig.resolved_alerts:
            out.append(_wrap("   resolved in the period: " + ", ".join(
                alert_meaning(a) for a in rig.resolved_alerts), 100))
        for x in rig.mutes:
            out.append(_wrap(f"   {_mute_text(x, z)}", 100))
        if len(rig.notes) > 5:
            out.append(f"   logbook: {len(rig.notes)} notes in {HISTORY_DAYS:g} days; the last 5:")
        for n in rig.notes[-5:]:
            out.append(_wrap(f"   {note_line(n, z)}", 100))
        for h in rig.hints:
            out.append(_wrap(f"   hint: {h}", 100))
        if rig.safety_note:
            out.append(_wrap(f"   {rig.safety_note}", 100))
    if r.outbox:
        out.append("")
        out.append("messages: " + ", ".join(f"{k} {v}" for k, v in sorted(r.outbox.items())))
        if r.outbox.get("stuck"):
            out.append("   some messages could not be delivered for 24 h: see qcd alerts")
    return "\n".join(out)


def summary_line(sm: RigSummary) -> str:
    """'rig-b: ALERT - mains hum RMS up 3.1x its normal, channel 0 (IN 0) | hint: ...'."""
    what = "; ".join(sm.changes) or (f"{sm.n_files} file(s), nothing moved" if sm.n_files
                                      else "no files in the period")
    line = f"{sm.rig}: {sm.state.upper() if sm.severity >= 2 else sm.state} - {what}"
    return line + (f" | hint: {sm.hint}" if sm.hint else "")


def _line_unit(m: MeasureLine) -> tuple[str, float]:
    """A readable unit for a table row: the one its largest number reads best in."""
    vals = [abs(v) for v in (m.latest, m.median, m.high) if v is not None and math.isfinite(v)]
    return readable_unit(max(vals) if vals else None, m.unit)


def _times(v: float | None, k: float) -> float | None:
    return None if v is None else v * k


def note_line(n: dict, zone: str | None = "UTC") -> str:
    """'logbook 2026-11-03 14:20 CET: replaced the headstage' for one ``store.notes`` row, the
    time in ``zone`` (the rig's)."""
    what = "re-learned" if n.get("kind") == "relearn" else "logbook"
    return f"{what} {_when(n.get('at'), zone)}: {n.get('text')}"


def _channels_text(channels: Iterable[tuple[int, str]]) -> str:
    """'0 cell, 1 bath' (channel numbers with their names)."""
    return ", ".join(f"{i} {name}".strip() for i, name in channels)


def _wrap(text: str, width: int) -> str:
    import textwrap
    indent = len(text) - len(text.lstrip())
    return "\n".join(textwrap.wrap(text, width, subsequent_indent=" " * (indent + 2))) or text


# ----------------------------------------------------------------------------- trend

def trend_rows(store, rig: str, measure: str, *, channel: int | None, days: float,
               now: float) -> list[tuple]:
    """[(recorded_at, value, unit, flagged, file_id, path)] oldest first."""
    return _series(store, rig, measure, channel, now - days * 86400.0)


def sparkline(values: list[float], width: int = 60) -> str:
    """A one-line chart of the values (resampled to at most ``width`` characters)."""
    v = np.asarray([x for x in values if x is not None and math.isfinite(x)], dtype=float)
    if v.size == 0:
        return ""
    if v.size > width:
        idx = np.linspace(0, v.size, width + 1).astype(int)
        med = float(np.median(v))         # per bucket the value farthest from the median,
        v = np.array([seg[np.argmax(np.abs(seg - med))]          # so a spike or dip shows
                      for seg in (v[a:b] for a, b in zip(idx[:-1], idx[1:]))])
    lo, hi = float(v.min()), float(v.max())
    if hi <= lo:
        return _SPARKS[3] * v.size
    k = np.clip(((v - lo) / (hi - lo) * (len(_SPARKS) - 1)).round().astype(int), 0,
                len(_SPARKS) - 1)
    return "".join(_SPARKS[i] for i in k)


def render_trend_text(rig: str, measure: str, rows: list[tuple],
                      notes: Iterable[dict] = (), zone: str | None = "UTC") -> str:
    """The series as lines, the rig's logbook notes (``store.notes``) between them where they
    happened; times in ``zone`` (the rig's)."""
    if not rows:
        return f"{rig} {measure}: no stored values in that period"
    unit = rows[-1][2]
    vals = [r[1] for r in rows]
    nr = normal_range([r[1] for r in rows if not r[3]])
    head = [f"{rig} {measure}{f' ({unit})' if unit else ''}, {len(rows)} file(s), times in "
            f"{zone_name(zone, rows[-1][0])}",
            f"  {sparkline(vals)}  min {_num(min(vals)).strip()} max {_num(max(vals)).strip()}"]
    if nr:
        head.append(f"  median {_num(nr[0]).strip()}, robust SD {_num(nr[1]).strip()} "
                    f"(unflagged files)")
    pending = sorted(notes, key=lambda n: n["at"])
    body = []
    for r in rows:
        while pending and pending[0]["at"] <= r[0]:
            body.append(f"  -- {note_line(pending.pop(0), zone)}")
        body.append(f"  {local_time(r[0], zone):%Y-%m-%d %H:%M}  {_num(r[1], 11)} {unit:<7}{'flagged' if r[3] else '':<8}"
                    f" {_short(r[5])}")
    body += [f"  -- {note_line(n, zone)}" for n in pending]
    return "\n".join(head + [""] + body)


def _name(path: Any) -> str:
    from pathlib import PurePath
    return PurePath(str(path or "")).name


def _short(path: Any, width: int = 48) -> str:
    s = str(path or "")
    return s if len(s) <= width else "..." + s[-(width - 3):]


def render_trend_csv(rows: list[tuple], zone: str | None = "UTC") -> str:
    """CSV with both times: UTC and the rig's local time (ISO 8601 with its offset)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["recorded_at_utc", "recorded_at_local", "recorded_at_unix", "value", "unit",
                "flagged", "file_id", "path"])
    for t, v, unit, flagged, fid, path in rows:
        iso = datetime.fromtimestamp(t, tz=timezone.utc).isoformat() if t is not None else ""
        loc = local_time(t, zone).isoformat() if t is not None else ""
        w.writerow([iso, loc, t, repr(float(v)), unit, int(bool(flagged)), fid, path])
    return buf.getvalue()


# ----------------------------------------------------------------------------- alerts

@dataclass(frozen=True)
class AlertList:
    """What ``qcd alerts`` shows: open and recently resolved alerts, mutes, the outbox."""
    days: float
    open: tuple[dict, ...]
    resolved: tuple[dict, ...]
    mutes: tuple[Mute, ...]
    outbox: dict[str, int]
    stuck: tuple[dict, ...]


def build_alerts(store: Store, now: float, *, days: float, rig: str | None = None) -> AlertList:
    """Open alerts, those resolved in the last ``days``, active mutes and the outbox (of one
    rig, or every rig when None)."""
    return AlertList(
        days, tuple(store.open_alerts(rig)), tuple(store.recent_alerts(now - days * 86400.0, rig)),
        tuple(s for s in store.active_mutes(now)
              if rig is None or fnmatch.fnmatchcase(rig, s.rig_glob)),
        dict(store.outbox_counts()),
        tuple(r for r in store.stuck_rows() if rig is None or r["rig"] == rig))


def _table(title: str, head: tuple[str, ...], rows: list[tuple]) -> list[str]:
    out = [f"{title}: {len(rows) or 'none'}"]
    if not rows:
        return out
    cells = [tuple(head)] + [tuple("-" if c is None else str(c) for c in r) for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(head))]
    for r in cells:
        out.append("  " + "  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip())
    return out


def render_alerts(a: AlertList, *, secrets: Iterable[str] = (),
                  zones: dict[str, str | None] | None = None, lab_zone: str | None = None
                  ) -> str:
    """Plain text tables, times in each rig's zone (``zones``; else ``lab_zone``, None: this
    computer's), the zone named; ``secrets`` (notification URLs) are redacted from delivery
    errors."""
    secrets = tuple(secrets)
    zones = zones or {}

    def _local(t: float | None, rig: str | None = None) -> str:
        return local_text(t, zones.get(rig, lab_zone) if rig else lab_zone)
    out = _table("open alerts", ("rig", "channel", "measure", "rule", "state", "opened",
                                 "announced"),
                 [(x["rig"], x["channel"], x["measure"], x["rule"], x["state"],
                   _local(x["opened_at"], x["rig"]), "yes" if x["announced"] else "no")
                  for x in a.open])
    out += _table(f"resolved in the last {a.days:g} days", ("rig", "channel", "measure", "rule",
                                                            "opened", "resolved"),
                  [(x["rig"], x["channel"], x["measure"], x["rule"],
                    _local(x["opened_at"], x["rig"]), _local(x["resolved_at"], x["rig"]))
                   for x in a.resolved])
    out += _table("active mutes", ("id", "rig", "rules", "from", "until", "reason"),
                  [(x.id, x.rig_glob, x.rule_glob, _local(x.start_at),
                    "resolved" if x.end_at is None else _local(x.end_at), x.reason)
                   for x in a.mutes])
    ob = a.outbox
    out.append(f"outbox: {ob['pending']} pending, {ob['sent']} sent, {ob['stuck']} stuck")
    out += _table("undeliverable messages", ("id", "rig", "title", "attempts", "created",
                                             "last error"),
                  [(r["id"], r["rig"], r["title"], r["attempts"],
                    _local(r["created_at"], r["rig"]),
                    redact_text(r["last_error"] or "", secrets)) for r in a.stuck])
    return "\n".join(out)


# ----------------------------------------------------------------------------- HTML

def _trend_images(rig: RigReport, now: float, since: float) -> list[str]:
    """One image per trend plot, so the page lays them out two per row on a wide screen and
    one per row on a phone."""
    lines = {(m.measure, m.channel): m for m in rig.measures}
    panels = []
    for t in rig.trends:
        m = lines[(t.measure, t.channel)]
        info = MEASURES[t.measure]
        name = f" {t.channel_name}" if t.channel_name else ""
        unit, k = _line_unit(m)                  # the table's readable unit
        panels.append(Panel(
            f"{info.label} ({t.measure}, ch {t.channel}{name})", pretty_unit(unit),
            [p[0] for p in t.points], [p[1] * k for p in t.points], [p[2] for p in t.points],
            tuple(b * k for b in t.band) if t.band is not None else None,
            t.alerts_opened, info.log_axis, tuple((n["at"], n["text"]) for n in rig.notes),
            band_label=t.band_label))
    out = [trend_figure([p], shade=(since, now), zone=get_zone(rig.timezone),
                        zone_label=rig.zone_label or "UTC") for p in panels]
    return [u for u in out if u]


def _spectrum_image(s: LatestSpectrum) -> str:
    curves = []
    if s.reference is not None and len(s.reference.freqs_hz):
        curves.append(Curve(s.reference.freqs_hz, s.reference.density,
                            "rig reference (median of recent good files)", "#7a8494", 1.4))
    curves.append(Curve(s.spectrum.freqs_hz, s.spectrum.density,
                        f"latest: {_name(s.path)}", "#c8553d"))
    return spectra_figure(curves, unit=s.spectrum.unit, line_hz=s.line_hz,
                          title=f"latest baseline spectrum against the rig's reference, "
                                f"channel {s.channel}")


def render_html(r: Report) -> str:
    """The morning report as one self-contained HTML page (plots as data: URIs)."""
    parts = [f"<h1>qcd morning report</h1><p class='sub'>{_when(r.since, r.timezone)} to "
             f"{_when(r.generated_at, r.timezone)} (times in "
             f"{html.escape(r.zone_label or 'UTC')}) &middot; {len(r.rigs)} rig(s)</p>"
             f"<p class='sub key'><span class='sw band'></span>{html.escape(BAND_TEXT)}. "
             f"<span class='sw period'></span>The grey shading on the {HISTORY_DAYS:g}-day trend "
             f"plots is this report's period.</p>"]
    if r.outbox.get("stuck"):
        parts.append(f"<p class='safety'>{r.outbox['stuck']} message(s) could not be delivered "
                     f"for 24 h; see <code>qcd alerts</code>.</p>")
    if r.summary:
        rows = []
        for i, sm in enumerate(r.summary, start=1):
            cls = "bad" if sm.severity >= 4 else "warn" if sm.severity >= 1 else ""
            what = "; ".join(sm.changes) or (f"{sm.n_files} file(s), nothing moved"
                                              if sm.n_files else "no files in the period")
            rows.append(f"<tr><td class='num'>{i}</td><td class='nw'><a href='#{_anchor(sm.rig)}'>"
                        f"{html.escape(sm.rig)}</a></td><td class='nw'><span class='pill {cls}'>"
                        f"{html.escape(sm.state)}</span></td><td>{html.escape(what)}</td>"
                        f"<td class='opt'>{html.escape(sm.hint)}</td></tr>")
        parts.append("<table class='summary'><thead><tr><th>#</th><th>rig</th><th>state</th>"
                     "<th>what changed</th><th class='opt'>hint</th></tr></thead><tbody>"
                     + "".join(rows) + "</tbody></table>")
    for rig in r.rigs:
        z = rig.timezone
        cls = "bad" if rig.open_alerts else ("warn" if rig.n_error or rig.n_flagged else "")
        status = (f"{len(rig.open_alerts)} open alert(s)" if rig.open_alerts else
                  "no open alerts")
        parts.append(f"<section class='rig' id='{_anchor(rig.rig)}'><h2>{html.escape(rig.rig)} "
                     f"<span class='pill {cls}'>{status}</span></h2>"
                     f"<p class='meta'>{rig.n_files} file(s) in the period: {rig.n_ok} ok, "
                     f"{rig.n_error} error, {rig.n_flagged} flagged</p>")
        if rig.zone_label and rig.zone_label != r.zone_label:
            parts.append(f"<p class='meta'>times in {html.escape(rig.zone_label)}</p>")
        for line in _odd_times_lines(rig):
            parts.append(f"<p class='meta'>{html.escape(line)}</p>")
        if any(name for _, name in rig.channels):
            parts.append(f"<p class='meta'>channels: "
                         f"{html.escape(_channels_text(rig.channels))}</p>")
        if rig.open_alerts:
            parts.append("<ul class='alerts'>" + "".join(
                f"<li><b>{html.escape(alert_meaning(a))}</b> since "
                f"{html.escape(_when(a.get('opened_at'), z))} <span class='meta'>(rule "
                f"{html.escape(str(a.get('rule')))})</span></li>" for a in rig.open_alerts)
                + "</ul>")
        if rig.resolved_alerts:
            parts.append("<p class='meta'>resolved in the period: " + html.escape(", ".join(
                alert_meaning(a) for a in rig.resolved_alerts)) + "</p>")
        for x in rig.mutes:
            parts.append(f"<p class='meta'>{html.escape(_mute_text(x, z))}</p>")
        if rig.notes:
            parts.append("<ul class='notes'>" + "".join(
                f"<li>{html.escape(note_line(n, z))}</li>" for n in rig.notes) + "</ul>")
        for h in rig.hints:
            parts.append(f"<p class='hint'>{html.escape(h)}</p>")
        if rig.safety_note:
            parts.append(f"<p class='safety'>{html.escape(rig.safety_note)}</p>")
        if rig.measures:
            parts.append("<table class='measures'><thead><tr><th>measure</th><th>ch</th>"
                         "<th>latest</th><th class='opt'>median</th><th>reference band</th>"
                         "<th>unit</th><th>state</th></tr></thead><tbody>")
            for m in rig.measures:
                unit, k = _line_unit(m)
                rng = (f"{_num(_times(m.low, k)).strip()} &ndash; "
                       f"{_num(_times(m.high, k)).strip()}" if m.low is not None else "&ndash;")
                info = MEASURES.get(m.measure)
                label = html.escape(info.label if info else m.measure)
                parts.append(f"<tr class='{m.state}'><td title='{m.measure}'>{label}</td>"
                             f"<td>{m.channel}</td>"
                             f"<td class='num'>{_num(_times(m.latest, k)).strip()}</td>"
                             f"<td class='num opt'>{_num(_times(m.median, k)).strip()}</td>"
                             f"<td class='num'>{rng}</td><td>{html.escape(pretty_unit(unit))}"
                             f"</td><td class='state'>{m.state}</td></tr>")
            parts.append("</tbody></table>")
        imgs = _trend_images(rig, r.generated_at, r.since)
        if imgs:
            parts.append("<div class='trends'>" + "".join(
                f"<img alt='trend of {html.escape(rig.rig)}' src='{u}'>" for u in imgs)
                + "</div>")
        if rig.spectrum is not None:
            parts.append(f"<img alt='latest spectrum of {html.escape(rig.rig)}' "
                         f"src='{_spectrum_image(rig.spectrum)}'>")
        parts.append(_files_table(rig))
        parts.append("</section>")
    return page("qcd morning report", "".join(parts))


def _anchor(rig: str) -> str:
    return "rig-" + re.sub(r"[^A-Za-z0-9_.-]", "-", rig)


def _files_table(rig: RigReport) -> str:
    if not rig.files:
        return "<p class='meta'>No files in the period.</p>"
    rows = []
    for f in rig.files:
        cls = "err" if f.get("status") == "error" else ("flag" if f.get("flagged") else "")
        flag = ("error: " + html.escape(str(f.get("error") or f.get("error_kind") or ""))
                if f.get("status") == "error" else
                ("<br>".join(html.escape(x) for x in f.get("flags") or ()) or "flagged")
                if f.get("flagged") else "ok")
        rows.append(f"<tr class='{cls}'><td>{_when(_file_time(f), rig.timezone)}</td>"
                    f"<td class='path' title='{html.escape(str(f.get('path') or ''))}'>"
                    f"{html.escape(_name(f.get('path')))}</td>"
                    f"<td class='opt'>{html.escape(str(f.get('mode') or ''))}</td>"
                    f"<td>{flag}</td></tr>")
    table = ("<table class='files'><thead><tr><th>recorded</th><th>file</th>"
             "<th class='opt'>mode</th><th>flags</th>"
             "</tr></thead><tbody>" + "".join(rows) + "</tbody></table>")
    return f"<details open><summary>files of the period ({len(rig.files)})</summary>{table}</details>"
