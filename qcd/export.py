"""Per-file verdicts for analysis: one row per stored file and channel, its measures, and pass
or fail by the rules the alerts use, grouped by cell where the rig names its cells.

The verdict is qcd.judge's: fixed limits are judged again now (the rules as they are, so a
lab's inclusion criteria apply to files stored before them), and drift findings are the ones
the rig's history gave when the file came in (stored with it: that judgement depends on the
history as it was then). Imports qcd.judge, qcd.ruleset, qcd.results, qcd.config (types) and
the Store it is given.
"""
from __future__ import annotations

import csv
import io
import json
import math
import re
from dataclasses import dataclass, replace
from datetime import datetime, timezone
from pathlib import PurePath
from typing import TYPE_CHECKING, Any, Iterable, Sequence

from qcd.judge import Finding, judge
from qcd.results import MEASURES, FileMeasures
from qcd.ruleset import Rules

if TYPE_CHECKING:
    from qcd.config import RigConfig
    from qcd.store import Store

__all__ = ["Row", "verdicts", "file_verdicts", "cell_of", "render_csv", "render_jsonl",
           "summary"]


@dataclass(frozen=True)
class Row:
    """One file and channel (``channel`` None: a file that could not be measured)."""
    rig: str
    file_id: int
    path: str
    recorded_at: float | None
    status: str
    mode: str
    channel: int | None
    channel_name: str
    unit: str
    measures: dict[str, tuple[Any, str]]      # name -> (value, unit), as stored
    verdict: str                              # 'pass' | 'fail'
    reasons: tuple[str, ...]                  # the limits it broke, one text each
    cell: str = ""
    cell_verdict: str = ""                    # 'pass' when every file of the cell passes
    cell_files: int = 0
    cell_failed: int = 0


def cell_of(pattern: str | None, path: str) -> str:
    """The cell a file belongs to: ``pattern`` searched in its name; the group named 'cell',
    else the only group, else the whole match; '' without a pattern or a match."""
    if not pattern:
        return ""
    m = re.search(pattern, PurePath(path).name)
    if m is None:
        return ""
    if "cell" in m.re.groupindex:
        return m.group("cell") or ""
    return (m.group(1) if m.re.groups == 1 else m.group(0)) or ""


def _number(v: Any) -> str:
    return f"{v:.4g}" if isinstance(v, (int, float)) and not isinstance(v, bool) else str(v)


def _reason(rule: str, measure: str, value: Any, unit: str, text: str, kind: str) -> str:
    """'access_high: access_resistance 31.2 MOhm (limit above 25 MOhm)', or for a drift
    finding its statistic: 'seal_drop: seal_resistance 0.276 GOhm (robust z -63.6 (flag
    beyond 4))'. No ';' inside, so a list of reasons can be joined with '; '."""
    if kind != "drift" and text.startswith("is "):      # a true/false limit: 'is true on ...'
        return f"{rule}: {measure} {text.replace(';', ',')}"
    shown = "" if value is None else f" {_number(value)} {unit}".rstrip()
    if kind == "drift":          # 'normal a-b (median m, n files); <statistic>[; learning ...]'
        text = ", ".join(text.split("; ")[1:]) or text
    else:
        text = "limit " + text
    return f"{rule}: {measure}{shown} ({text.replace(';', ',')})"


def _no_history(mode: str, channel: int, measure: str, *, clean_files: bool = False
                ) -> list[tuple[float, float]]:
    """A history with no files (fixed limits only; the hints then name the measure's group)."""
    return []


def file_verdicts(fm: FileMeasures, rig: str, limits: Rules, drift: Iterable[dict],
                  now: float) -> dict[int | None, list[str]]:
    """{channel: reasons} of one measured file: its fixed limits judged now by ``judge`` with
    ``limits`` (rules without history), plus the stored bad drift findings ``drift``.
    A file-level finding counts for each channel it names (every channel when it names none)."""
    out: dict[int | None, list[str]] = {c.index: [] for c in fm.channels}
    found: list[Finding] = judge(fm, rig, _no_history, limits, now)
    for f in found:
        if not f.bad or f.kind == "drift" or f.learning:
            continue
        text = _reason(f.rule, f.measure, f.value, f.unit, f.limit_text, f.kind)
        chans = [f.channel] if f.channel >= 0 else list(f.channels) or list(out)
        for c in chans:
            out.setdefault(c, []).append(text)
    for d in drift:
        if d.get("bad") and d.get("kind") == "drift":
            out.setdefault(d.get("channel"), []).append(_reason(
                d["rule"], d["measure"], d.get("value"), d.get("unit") or "",
                d.get("limit_text") or "", "drift"))
    return out


def verdicts(store: Store, rules: Rules, *, rigs: Sequence[str] | None = None,
             since: float | None = None, config_rigs: Sequence[RigConfig] = (),
             now: float) -> list[Row]:
    """Every current stored file of ``rigs`` (default all) recorded at or after ``since``:
    one Row per file and watched channel, oldest first per rig, with cell verdicts where the
    rig's ``cell_pattern`` (from ``config_rigs``) names cells."""
    limits = Rules(limits=rules.limits, history=(), settings=rules.settings,
                   sources=rules.sources)
    patterns = {r.name: r.cell_pattern for r in config_rigs}
    rows: list[Row] = []
    for rig in (list(rigs) if rigs else store.rigs()):
        rig_rows: list[Row] = []
        for f in store.files(rig=rig, since=since):
            cell = cell_of(patterns.get(rig), f["path"])
            base = dict(rig=rig, file_id=int(f["id"]), path=f["path"],
                        recorded_at=f["recorded_at"], status=f["status"], mode=f["mode"] or "",
                        cell=cell)
            src = int(f["id"])                # a copy is judged by the first file's measures
            same = (f.get("extra") or {}).get("same_as") if f["status"] == "skipped" else None
            if same is not None:
                src = int(same)
            fm = store.measured(src) if f["status"] == "ok" or same is not None else None
            if fm is not None and fm.status != "ok":
                fm = None
            if fm is None:
                why = f"not measured ({f.get('error_kind') or 'error'}): {f.get('error') or ''}"
                rig_rows.append(Row(channel=None, channel_name="", unit="", measures={},
                                    verdict="fail", reasons=(why.rstrip(": "),), **base))
                continue
            reasons = file_verdicts(fm, rig, limits, store.findings(src), now)
            for ch in fm.channels:
                why = tuple(dict.fromkeys(reasons.get(ch.index, ())))
                rig_rows.append(Row(
                    channel=ch.index, channel_name="" if ch.name == "?" else ch.name, unit=ch.unit,
                    measures={k: (m.value, m.unit) for k, m in ch.measures.items()},
                    verdict="fail" if why else "pass", reasons=why, **base))
            if not fm.channels:
                rig_rows.append(Row(channel=None, channel_name="", unit="", measures={},
                                    verdict="pass", reasons=(), **base))
        rows += _with_cells(rig_rows)
    return rows


def _with_cells(rows: list[Row]) -> list[Row]:
    """Each row with its cell's verdict: pass when every file of the cell passes."""
    files: dict[str, dict[int, bool]] = {}
    for r in rows:
        if r.cell:
            files.setdefault(r.cell, {})
            files[r.cell][r.file_id] = files[r.cell].get(r.file_id, False) or r.verdict == "fail"
    out = []
    for r in rows:
        if r.cell:
            failed = sum(files[r.cell].values())
            r = replace(r, cell_verdict="fail" if failed else "pass",
                        cell_files=len(files[r.cell]), cell_failed=failed)
        out.append(r)
    return out


def summary(rows: Sequence[Row]) -> str:
    """'252 files (360 rows) of 4 rigs: 230 files pass, 22 fail; 40 cells: 35 pass, 5 fail'."""
    by_file: dict[int, bool] = {}
    for r in rows:
        by_file[r.file_id] = by_file.get(r.file_id, False) or r.verdict == "fail"
    cells = {(r.rig, r.cell): r.cell_verdict for r in rows if r.cell}
    failed = sum(by_file.values())
    n_rigs = len({r.rig for r in rows})
    text = (f"{len(by_file)} files ({len(rows)} rows) of {n_rigs} rig{'' if n_rigs == 1 else 's'}: "
            f"{len(by_file) - failed} files pass, {failed} fail")
    if cells:
        bad = sum(v == "fail" for v in cells.values())
        text += f"; {len(cells)} cells: {len(cells) - bad} pass, {bad} fail"
    return text


def _iso(t: float | None) -> str:
    return "" if t is None else datetime.fromtimestamp(t, tz=timezone.utc).isoformat()


def _measure_names(rows: Iterable[Row]) -> list[str]:
    """Measure names with a plain value in any row, in the registry's order."""
    seen = {k for r in rows for k, (v, _) in r.measures.items()
            if isinstance(v, (int, float, bool))}
    return [n for n in MEASURES if n in seen] + sorted(seen - set(MEASURES))


_COLUMNS = ("rig", "file", "path", "recorded_at_utc", "cell", "cell_verdict", "mode", "status",
            "channel", "channel_name", "unit", "verdict", "reasons")


def render_csv(rows: Sequence[Row]) -> str:
    """One line per row: the columns above, then one column per measure (named as everywhere
    in qcd; values in the display units the README lists, signal measures in ``unit``)."""
    names = _measure_names(rows)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(list(_COLUMNS) + names)
    for r in rows:
        cells = [r.rig, PurePath(r.path).name, r.path, _iso(r.recorded_at), r.cell,
                 r.cell_verdict, r.mode, r.status, "" if r.channel is None else r.channel,
                 r.channel_name, r.unit, r.verdict, "; ".join(r.reasons)]
        for n in names:
            v = r.measures.get(n, (None, ""))[0]
            if isinstance(v, bool):
                v = int(v)
            cells.append("" if v is None or (isinstance(v, float) and not math.isfinite(v))
                         or not isinstance(v, (int, float)) else repr(v))
        w.writerow(cells)
    return buf.getvalue()


def _plain(name: str, v: Any) -> Any:
    """A value as ``qcd scan --json`` writes it (spectral lines as {"freq_hz", "rms"})."""
    if name == "spectral_lines" and isinstance(v, (list, tuple)):
        return [{"freq_hz": _plain("", f), "rms": _plain("", r)} for f, r in v]
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def render_jsonl(rows: Sequence[Row]) -> str:
    """One JSON object per row and line (measures as {"value", "unit"})."""
    lines = []
    for r in rows:
        doc = {"rig": r.rig, "file": PurePath(r.path).name, "path": r.path,
               "recorded_at_utc": _iso(r.recorded_at), "recorded_at_unix": r.recorded_at,
               "cell": r.cell or None, "cell_verdict": r.cell_verdict or None,
               "cell_files": r.cell_files or None, "cell_failed": r.cell_failed if r.cell else None,
               "mode": r.mode, "status": r.status, "channel": r.channel,
               "channel_name": r.channel_name, "unit": r.unit, "verdict": r.verdict,
               "reasons": list(r.reasons),
               "measures": {k: {"value": _plain(k, v), "unit": u} for k, (v, u) in
                            r.measures.items()}}
        lines.append(json.dumps(doc, allow_nan=False))
    return "\n".join(lines) + ("\n" if lines else "")
