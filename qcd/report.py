"""The morning report and trends from the store: plain data, terminal text, JSON and one
self-contained HTML file (plots embedded as base64 PNG, no network, no outside files).

Imports qcd.store (read queries only), qcd.units, numpy and matplotlib (Agg backend);
qcd.judge only for its SAFETY_NOTE. The before/after comparison lives in qcd.compare.
"""
from __future__ import annotations

import base64
import csv
import fnmatch
import html
import io
import math
import re
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from typing import Any, Iterable

import numpy as np

from qcd.config import parse_duration
from qcd.errors import ConfigError
from qcd.measures.noise import MAD_SCALE
from qcd.results import MEASURES, SAFETY_NOTE, file_time, shown

__all__ = ["KEY_MEASURES", "MeasureLine", "RigReport", "Report", "parse_since", "normal_range",
           "build_report", "render_text", "render_html", "trend_rows", "render_trend_text",
           "render_trend_csv", "sparkline", "figure_data_uri", "page"]

# The measures the morning report shows, in this order, when a rig has them.
KEY_MEASURES = shown("report")
NORMAL_SPREADS = 3.0        # normal range = median +- 3 robust SD (1.4826 MAD)
HISTORY_DAYS = 30.0
_SPARKS = "\u2581\u2582\u2583\u2584\u2585\u2586\u2587\u2588"


def _is_grounding(hint: str) -> bool:
    return bool(re.search(r"ground|earth|mains|hum", hint, re.I))


def parse_since(text: str, now: float) -> float:
    """'18h', '3d', '90m', '2w' (``parse_duration``) or an ISO date/time (UTC when no zone)
    -> Unix seconds."""
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
        dt = dt.replace(tzinfo=timezone.utc)
    return dt.timestamp()


def normal_range(values: Iterable[float]) -> tuple[float, float, int] | None:
    """(median, robust SD = 1.4826 MAD, n) of a history; None when empty.

    Robust z as in Iglewicz & Hoaglin 1993 / Rousseeuw & Croux 1993 (METHODS.md section 7).
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
    silences: tuple[dict, ...] = ()      # active silences matching the rig
    resolved_alerts: tuple[dict, ...] = ()   # alerts that resolved within the period


@dataclass(frozen=True)
class Report:
    generated_at: float
    since: float
    rigs: tuple[RigReport, ...]
    outbox: dict = field(default_factory=dict)

    def to_json(self) -> dict[str, Any]:
        return asdict(self)


def _file_time(f: dict) -> float:
    return file_time(f.get("recorded_at"), f.get("mtime"), 0.0)


def _series(store, rig: str, measure: str, channel: int | None, since: float | None):
    rows = store.measure_series(rig, measure, channel=channel, since=since)
    return sorted(rows, key=lambda r: (r[0] if r[0] is not None else 0.0))


def _channels_of(store, rig: str, measure: str, since: float) -> list[int]:
    """Input channels (0-3) that carry this measure in the rig's recent files."""
    return [ch for ch in range(4) if store.measure_series(rig, measure, channel=ch, since=since)]


def _measure_line(store, rig: str, measure: str, channel: int, now: float) -> MeasureLine | None:
    rows = _series(store, rig, measure, channel, now - HISTORY_DAYS * 86400.0)
    if not rows:
        return None
    t, value, unit = rows[-1][0], rows[-1][1], rows[-1][2]
    history = [r[1] for r in rows[:-1] if not r[3]]       # unflagged, before the latest
    nr = normal_range(history)
    if nr is None or nr[2] < 3:
        return MeasureLine(measure, channel, unit, value, t, nr[0] if nr else None,
                           nr[1] if nr else None, None, None, nr[2] if nr else 0, "no history")
    med, sd, n = nr
    lo, hi = med - NORMAL_SPREADS * sd, med + NORMAL_SPREADS * sd
    if min(history) >= 0.0:               # a measure that cannot be negative
        lo = max(lo, 0.0)
    state = "high" if value > hi else "low" if value < lo else "normal"
    return MeasureLine(measure, channel, unit, value, t, med, sd, lo, hi, n, state)


def _flag_text(fd: dict) -> str:
    """'seal_resistance 0.274 GOhm (gigaseal: below 1 GOhm)' for one bad finding."""
    v = fd.get("value")
    value = f" {v:.3g} {fd.get('unit') or ''}".rstrip() if isinstance(v, (int, float)) else ""
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


def build_report(store, now: float, since: float, rigs: Iterable[str] | None = None) -> Report:
    """Per rig: the period's files, each key measure against its normal range, open alerts
    and the noise-source hints of the period's findings."""
    names = list(rigs) if rigs else list(store.rigs())
    out = []
    for rig in names:
        files = sorted(store.files(rig=rig, since=since, until=None), key=_file_time)
        files = [f for f in files if not f.get("superseded")]
        lines = []
        for measure in KEY_MEASURES:
            for ch in _channels_of(store, rig, measure, now - HISTORY_DAYS * 86400.0):
                ml = _measure_line(store, rig, measure, ch, now)
                if ml is not None:
                    lines.append(ml)
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
        silences = tuple({"rig_glob": x.rig_glob, "rule_glob": x.rule_glob,
                          "start_at": x.start_at, "end_at": x.end_at, "reason": x.reason}
                         for x in store.active_silences(now) if fnmatch.fnmatchcase(rig, x.rig_glob))
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
            SAFETY_NOTE if any(_is_grounding(h) for h in hints) else None, silences,
            resolved))
    return Report(now, since, tuple(out), dict(store.outbox_counts()))


# ----------------------------------------------------------------------------- terminal

def _num(v: float | None, width: int = 9) -> str:
    if v is None or not math.isfinite(v):
        return f"{'-':>{width}}"
    s = f"{v:.3g}"
    return f"{s:>{width}}"


def _when(t: float | None) -> str:
    if t is None:
        return "-"
    return datetime.fromtimestamp(t, tz=timezone.utc).strftime("%Y-%m-%d %H:%M")


def _alert_text(a: dict) -> str:
    parts = [str(a.get(k)) for k in ("measure", "rule") if a.get(k)]
    ch = a.get("channel")
    chs = f" ch{ch}" if ch not in (None, "", -1) else ""
    return f"{' / '.join(parts) or a.get('key', '?')}{chs} since {_when(a.get('opened_at'))}"


def _silence_text(x: dict) -> str:
    until = "its alerts resolve" if x.get("end_at") is None else _when(x["end_at"]) + " UTC"
    rules = "" if x.get("rule_glob") in (None, "*") else f" (rules {x['rule_glob']})"
    why = f": {x['reason']}" if x.get("reason") else ""
    return f"silenced until {until}{rules}{why}"


def render_text(r: Report) -> str:
    """The compact terminal report; every line fits 100 columns."""
    out = [f"qcd morning report, {_when(r.since)} to {_when(r.generated_at)} UTC"]
    if not r.rigs:
        out.append("No rigs in the store yet.")
    for rig in r.rigs:
        out.append("")
        out.append(f"== {rig.rig}: {rig.n_files} file(s), {rig.n_ok} ok, {rig.n_error} error, "
                   f"{rig.n_flagged} flagged")
        if rig.measures:
            out.append(f"   {'measure':<22}{'ch':>3} {'latest':>9} {'median':>9} "
                       f"{'normal range':>21} {'unit':<7}state")
            for m in rig.measures:
                rng = (f"{_num(m.low, 9).strip()} .. {_num(m.high, 9).strip()}"
                       if m.low is not None else "-")
                mark = {"high": "HIGH", "low": "LOW"}.get(m.state, m.state)
                out.append(f"   {m.measure:<22}{m.channel:>3} {_num(m.latest)} {_num(m.median)} "
                           f"{rng:>21} {m.unit:<7}{mark}")
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
            out.append(_wrap(f"   flagged {_when(_file_time(f))} {_name(f.get('path'))}: "
                             + ", ".join(short), 100))
        if rig.open_alerts:
            out.append("   open alerts:")
            out += [_wrap(f"     - {_alert_text(a)}", 100) for a in rig.open_alerts]
        else:
            out.append("   open alerts: none")
        if rig.resolved_alerts:
            out.append(_wrap("   resolved in the period: " + ", ".join(
                f"{a.get('measure')} / {a.get('rule')}" for a in rig.resolved_alerts), 100))
        for x in rig.silences:
            out.append(_wrap(f"   {_silence_text(x)}", 100))
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


def render_trend_text(rig: str, measure: str, rows: list[tuple]) -> str:
    if not rows:
        return f"{rig} {measure}: no stored values in that period"
    unit = rows[-1][2]
    vals = [r[1] for r in rows]
    nr = normal_range([r[1] for r in rows if not r[3]])
    head = [f"{rig} {measure}{f' ({unit})' if unit else ''}, {len(rows)} file(s)",
            f"  {sparkline(vals)}  min {_num(min(vals)).strip()} max {_num(max(vals)).strip()}"]
    if nr:
        head.append(f"  median {_num(nr[0]).strip()}, robust SD {_num(nr[1]).strip()} "
                    f"(unflagged files)")
    body = [f"  {_when(r[0])}  {_num(r[1], 11)} {unit:<7}{'flagged' if r[3] else '':<8}"
            f" {_short(r[5])}" for r in rows]
    return "\n".join(head + [""] + body)


def _name(path: Any) -> str:
    from pathlib import PurePath
    return PurePath(str(path or "")).name


def _short(path: Any, width: int = 48) -> str:
    s = str(path or "")
    return s if len(s) <= width else "..." + s[-(width - 3):]


def render_trend_csv(rows: list[tuple]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["recorded_at_utc", "recorded_at_unix", "value", "unit", "flagged", "file_id",
                "path"])
    for t, v, unit, flagged, fid, path in rows:
        iso = datetime.fromtimestamp(t, tz=timezone.utc).isoformat() if t is not None else ""
        w.writerow([iso, t, repr(float(v)), unit, int(bool(flagged)), fid, path])
    return buf.getvalue()


# ----------------------------------------------------------------------------- HTML

_CSS = """
body{font:14px/1.45 system-ui,-apple-system,'Segoe UI',sans-serif;color:#1d2430;margin:0;
background:#f4f5f7}
main{max-width:1180px;margin:0 auto;padding:24px 28px 60px}
h1{font-size:24px;margin:0 0 4px}h2{font-size:19px;margin:0 0 10px;display:flex;gap:12px;
align-items:baseline}
.sub{color:#5a6472;margin:0 0 18px}
section.rig{background:#fff;border:1px solid #dde1e7;border-radius:8px;padding:18px 20px;
margin:18px 0}
.pill{font-size:12px;font-weight:600;border-radius:10px;padding:2px 9px;background:#e6efe6;
color:#235a2c}.pill.bad{background:#fbe4e1;color:#8c2415}.pill.warn{background:#fff1d6;
color:#7a5200}
table{border-collapse:collapse;width:100%;margin:8px 0 14px;font-size:13px}
th,td{text-align:left;padding:4px 8px;border-bottom:1px solid #eceef2;vertical-align:top}
th{background:#f7f8fa;font-weight:600}td.num{text-align:right;font-variant-numeric:tabular-nums}
tr.high td,tr.low td,tr.flag td,tr.sig td{background:#fdf0ee}tr.err td{background:#fff6e0}
img{max-width:100%;display:block;margin:6px 0 10px}
.alerts li{margin:2px 0}.hint{background:#f2f6fb;border-left:4px solid #4a6fa5;padding:6px 10px;
margin:6px 0}
.safety{background:#fff6e0;border-left:4px solid #c98a00;padding:6px 10px;margin:6px 0;
font-size:13px}
.meta{color:#5a6472}details summary{cursor:pointer;color:#4a6fa5;margin:6px 0}
"""


def page(title: str, body: str) -> str:
    """A whole self-contained HTML page around ``body``."""
    return (f"<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            f"<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>{html.escape(title)}</title><style>{_CSS}</style></head>"
            f"<body><main>{body}</main></body></html>\n")


def figure_data_uri(fig) -> str:
    """A matplotlib figure as a data: URI (PNG, base64)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _plt():
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    return plt


# Trend plots per rig (the table lists every key measure).
_PLOTTED = shown("plot")


def _trend_figure(store, rig: RigReport, now: float, since: float) -> str | None:
    from matplotlib.dates import AutoDateLocator, DateFormatter
    plt = _plt()
    lines = [m for m in rig.measures if m.measure in _PLOTTED][:6]
    if not lines:
        return None
    ncol = 2
    nrow = math.ceil(len(lines) / ncol)
    height = 2.25 * nrow + 0.45
    fig, axes = plt.subplots(nrow, ncol, figsize=(11.4, height), dpi=96, squeeze=False)
    fig.subplots_adjust(left=0.065, right=0.99, top=1 - 0.3 / height, bottom=0.5 / height,
                        hspace=0.5, wspace=0.14)
    t0 = now - HISTORY_DAYS * 86400.0
    marked = list(rig.open_alerts) + list(store.recent_alerts(t0, rig=rig.rig))
    for ax, m in zip(axes.flat, lines):
        opened = sorted({a.get("opened_at") for a in marked
                         if a.get("opened_at") and a.get("measure") == m.measure
                         and a.get("channel") in (None, m.channel)})
        rows = _series(store, rig.rig, m.measure, m.channel, t0)
        ts = [datetime.fromtimestamp(r[0], tz=timezone.utc) for r in rows]
        vs = np.array([r[1] for r in rows], dtype=float)
        fl = np.array([bool(r[3]) for r in rows])
        if m.low is not None:
            ax.axhspan(m.low, m.high, color="#4a9d5b", alpha=0.13, lw=0,
                       label="normal range")
            ax.axhline(m.median, color="#4a9d5b", lw=0.8, alpha=0.7)
        ax.plot(ts, vs, color="#4a6fa5", lw=0.9, marker="o", ms=2.6)
        if fl.any():
            ax.plot([t for t, f in zip(ts, fl) if f], vs[fl], "o", color="#c8553d", ms=4.5,
                    label="flagged file")
        for i, t in enumerate(opened):
            ax.axvline(datetime.fromtimestamp(t, tz=timezone.utc), color="#c8553d", lw=1.0,
                       ls="--", label="alert opened" if i == 0 else None)
        ax.axvspan(datetime.fromtimestamp(since, tz=timezone.utc),
                   datetime.fromtimestamp(now, tz=timezone.utc), color="#999999", alpha=0.08,
                   lw=0)
        name = MEASURES[m.measure].label
        ax.set_title(f"{name} ({m.measure}, ch {m.channel})", fontsize=9.5, loc="left")
        ax.set_ylabel(m.unit or "value", fontsize=9)
        ax.tick_params(labelsize=8)
        ax.xaxis.set_major_locator(AutoDateLocator(minticks=3, maxticks=7))
        ax.xaxis.set_major_formatter(DateFormatter("%m-%d"))
        ax.grid(True, alpha=0.25)
        if m.measure in ("hum_rms", "seal_resistance", "membrane_resistance") and \
                vs.size and np.all(vs > 0) and vs.max() / vs.min() > 20:
            ax.set_yscale("log")
        if fl.any() or m.low is not None or opened:
            ax.legend(fontsize=7, loc="best", framealpha=0.75)
    for ax in list(axes.flat)[len(lines):]:
        ax.axis("off")
    for ax in axes[-1]:
        if ax.has_data():
            ax.set_xlabel("date (UTC)", fontsize=9)
    uri = figure_data_uri(fig)
    plt.close(fig)
    return uri


def _spectrum_figure(store, rig: RigReport, now: float) -> str | None:
    ok = [f for f in rig.files if f.get("status") == "ok"]
    latest = ok[-1] if ok else None
    if latest is None:
        rows = _series(store, rig.rig, "noise_rms", 0, now - HISTORY_DAYS * 86400.0)
        if not rows:
            return None
        latest = {"id": rows[-1][4], "path": rows[-1][5], "mode": None,
                  "recorded_at": rows[-1][0]}
    spec = store.spectrum(latest["id"], 0)
    if spec is None or not len(spec.freqs_hz):
        return None
    ref = None
    try:
        ref = store.reference_spectrum(rig.rig, latest.get("mode") or "unknown", 0,
                                       before=_file_time(latest))
    except TypeError:
        ref = None
    plt = _plt()
    fig, ax = plt.subplots(figsize=(11.4, 3.6), dpi=96)
    fig.subplots_adjust(left=0.065, right=0.99, top=0.92, bottom=0.13)
    f = np.asarray(spec.freqs_hz, dtype=float)
    d = np.asarray(spec.density, dtype=float)
    sel = (f > 0) & (d > 0)
    if ref is not None and len(ref.freqs_hz):
        fr, dr = np.asarray(ref.freqs_hz), np.asarray(ref.density)
        rs = (fr > 0) & (dr > 0)
        ax.loglog(fr[rs], dr[rs], color="#7a8494", lw=1.4, label="rig reference (median of "
                  "recent good files)")
    ax.loglog(f[sel], d[sel], color="#c8553d", lw=1.1, label=f"latest: {_short(latest.get('path'), 40)}")
    line = _latest_value(store, rig.rig, "line_hz", now) or 0.0
    if line:
        top = f[sel].max() if sel.any() else 0
        for h in range(1, 11):
            if h * line > min(top, 1000.0):
                break
            ax.axvline(h * line, color="#c98a00", lw=0.7, ls=":", alpha=0.8,
                       label=f"mains harmonics ({line:g} Hz)" if h == 1 else None)
    if sel.any():                         # keep the filter roll-off from squashing the rest
        ax.set_ylim(bottom=max(float(np.min(d[sel])), float(np.median(d[sel])) * 1e-4) / 2)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel(f"PSD ({spec.unit}\u00b2/Hz)")
    ax.grid(True, which="major", alpha=0.3)
    ax.legend(fontsize=8, loc="lower left")
    ax.set_title("latest baseline spectrum against the rig's reference, channel 0",
                 fontsize=10, loc="left")
    uri = figure_data_uri(fig)
    plt.close(fig)
    return uri


def _latest_value(store, rig: str, measure: str, now: float) -> float | None:
    rows = _series(store, rig, measure, 0, now - HISTORY_DAYS * 86400.0)
    return float(rows[-1][1]) if rows else None


def render_html(r: Report, store) -> str:
    """The morning report as one self-contained HTML page (plots as data: URIs)."""
    parts = [f"<h1>qcd morning report</h1><p class='sub'>{_when(r.since)} to "
             f"{_when(r.generated_at)} UTC &middot; {len(r.rigs)} rig(s) &middot; trends over "
             f"the last {HISTORY_DAYS:g} days, normal range = median &plusmn; "
             f"{NORMAL_SPREADS:g} robust SD of the rig's unflagged files</p>"]
    if r.outbox.get("stuck"):
        parts.append(f"<p class='safety'>{r.outbox['stuck']} message(s) could not be delivered "
                     f"for 24 h; see <code>qcd alerts</code>.</p>")
    for rig in r.rigs:
        cls = "bad" if rig.open_alerts else ("warn" if rig.n_error or rig.n_flagged else "")
        status = (f"{len(rig.open_alerts)} open alert(s)" if rig.open_alerts else
                  "no open alerts")
        parts.append(f"<section class='rig'><h2>{html.escape(rig.rig)} "
                     f"<span class='pill {cls}'>{status}</span></h2>"
                     f"<p class='meta'>{rig.n_files} file(s) in the period: {rig.n_ok} ok, "
                     f"{rig.n_error} error, {rig.n_flagged} flagged</p>")
        if rig.open_alerts:
            parts.append("<ul class='alerts'>" + "".join(
                f"<li>{html.escape(_alert_text(a))}</li>" for a in rig.open_alerts) + "</ul>")
        if rig.resolved_alerts:
            parts.append("<p class='meta'>resolved in the period: " + html.escape(", ".join(
                f"{a.get('measure')} / {a.get('rule')}" for a in rig.resolved_alerts)) + "</p>")
        for x in rig.silences:
            parts.append(f"<p class='meta'>{html.escape(_silence_text(x))}</p>")
        for h in rig.hints:
            parts.append(f"<p class='hint'>{html.escape(h)}</p>")
        if rig.safety_note:
            parts.append(f"<p class='safety'>{html.escape(rig.safety_note)}</p>")
        if rig.measures:
            parts.append("<table><thead><tr><th>measure</th><th>ch</th><th>latest</th>"
                         "<th>median</th><th>normal range</th><th>unit</th><th>state</th>"
                         "</tr></thead><tbody>")
            for m in rig.measures:
                rng = (f"{_num(m.low).strip()} &ndash; {_num(m.high).strip()}"
                       if m.low is not None else "&ndash;")
                parts.append(f"<tr class='{m.state}'><td>{m.measure}</td><td>{m.channel}</td>"
                             f"<td class='num'>{_num(m.latest).strip()}</td>"
                             f"<td class='num'>{_num(m.median).strip()}</td>"
                             f"<td class='num'>{rng}</td><td>{html.escape(m.unit)}</td>"
                             f"<td>{m.state}</td></tr>")
            parts.append("</tbody></table>")
        img = _trend_figure(store, rig, r.generated_at, r.since)
        if img:
            parts.append(f"<img alt='trends of {html.escape(rig.rig)}' src='{img}'>")
        img = _spectrum_figure(store, rig, r.generated_at)
        if img:
            parts.append(f"<img alt='latest spectrum of {html.escape(rig.rig)}' src='{img}'>")
        parts.append(_files_table(rig))
        parts.append("</section>")
    return page("qcd morning report", "".join(parts))


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
        rows.append(f"<tr class='{cls}'><td>{_when(_file_time(f))}</td>"
                    f"<td>{html.escape(_short(f.get('path'), 70))}</td>"
                    f"<td>{html.escape(str(f.get('mode') or ''))}</td><td>{flag}</td></tr>")
    table = ("<table><thead><tr><th>recorded (UTC)</th><th>file</th><th>mode</th><th>flags</th>"
             "</tr></thead><tbody>" + "".join(rows) + "</tbody></table>")
    return f"<details open><summary>files of the period ({len(rig.files)})</summary>{table}</details>"
