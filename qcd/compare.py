"""Before/after comparison for the troubleshooting loop: record, change one thing, record again.

The two sides' baselines come from analyze (``baseline_blocks``, its own windows and blocks);
this module pairs them: per noise band and mains harmonic (qcd.measures.spectrum's bands and
hum) the change in dB and in the display unit, its standard error from the files' own
variation (block to block within a file, or file to file when folders are given), and the
registry's hint that fits. Terminal, JSON and HTML output.
Imports numpy, qcd.analyze, qcd.pipeline (measuring a side's files), qcd.recording,
qcd.intake (finding files), qcd.measures.spectrum, qcd.results and qcd.html.
"""
from __future__ import annotations

import html
import math
import textwrap
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from qcd.analyze import Baseline, baseline_blocks
from qcd.config import RigConfig
from qcd.errors import QcdError, RecordingError
from qcd.html import Curve, page, spectra_figure
from qcd.intake import recordings_in
from qcd.measures import mains
from qcd.measures import spectrum as sp
from qcd.pipeline import measure
from qcd.recording import open_recording
from qcd.results import HINTS, MEASURES, SAFETY_NOTE, shown

__all__ = ["Change", "Side", "Comparison", "compare_paths", "render_compare_text",
           "render_compare_html", "SIGNIFICANCE_SIGMAS", "MIN_DB", "MAX_DF_HZ"]

N_HARMONICS = 5                # mains harmonics listed one by one
SIGNIFICANCE_SIGMAS = 3.0      # a change counts when |change| > 3 standard errors ...
MIN_DB = 1.0                   # ... and at least 1 dB (common practice: smaller is not audible
                               # in a QC sense and within Welch bin scatter)
MAX_SEGMENTS = 600             # at most 10 min of a gap-free file
MAX_DF_HZ = 2.0                # coarser bins cannot separate mains harmonics from noise
_MIN_UNITS = 4                 # a single short file is cut into this many blocks if it can be
_DB = 10.0 / math.log(10.0)    # d(10 log10 P) = _DB dP / P


@dataclass(frozen=True)
class Side:
    """One side (before or after): its files, levels and their standard errors."""
    paths: tuple[str, ...]
    unit: str
    fs_hz: float
    line_hz: float | None                    # None: bins too coarse to resolve the mains
    units_of_variation: str                  # 'segments' (blocks of one file) | 'files'
    n: int                                   # segments or files the variation comes from
    rms: dict[str, float]                    # RMS per band / harmonic, in ``unit``
    se_db: dict[str, float]                  # standard error of each level in dB
    freqs_hz: tuple[float, ...] = ()
    density: tuple[float, ...] = ()          # mean PSD, unit**2/Hz
    measures: dict[str, float] = field(default_factory=dict)   # analyze's, channel `channel`


@dataclass(frozen=True)
class Change:
    name: str                 # a band or 'hum_rms' (registry names) or 'hum_h1', 'hum_h2', ...
    label: str
    before: float             # RMS in the display unit
    after: float
    unit: str
    change: float             # after - before, display unit
    change_db: float          # 20 log10(after/before); NaN when one side is at the floor (0)
    se_db: float              # standard error of change_db from the sides' own variation
    significant: bool


@dataclass(frozen=True)
class Comparison:
    before: Side
    after: Side
    channel: int
    changes: tuple[Change, ...]
    hint: str
    safety_note: str | None

    def to_json(self) -> dict[str, Any]:
        """Plain JSON (no spectra; a non-finite number is null)."""
        d = asdict(self)
        for side in ("before", "after"):
            d[side].pop("freqs_hz")
            d[side].pop("density")
        return _finite(d)


def _finite(v: Any) -> Any:
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, dict):
        return {k: _finite(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_finite(x) for x in v]
    return v


# ------------------------------------------------------------------------------ the two sides

def _files(path: Path) -> list[Path]:
    found = recordings_in(path)
    if not found:
        raise RecordingError(path, "not_a_file", "folder holds no recordings qcd reads")
    return found


def _read(path: Path, channel: int) -> Baseline:
    with open_recording(path) as rec:
        if channel >= len(rec.channels):
            raise RecordingError(path, "unsupported",
                                 f"has {len(rec.channels)} input channel(s), no channel {channel}")
        base = baseline_blocks(rec, channel, max_blocks=MAX_SEGMENTS)
    if not len(base.blocks):
        raise RecordingError(path, "unsupported", "no baseline samples to compare")
    return base


def _cut(blocks: np.ndarray, n: int) -> np.ndarray:
    """Blocks cut to length n (each gives floor(L/n) blocks of n samples)."""
    k = blocks.shape[1] // n
    return blocks[:, :k * n].reshape(-1, n)


def _psd(blocks: np.ndarray, fs: float) -> np.ndarray:
    X, _, _ = sp.block_fft(blocks)
    return sp.hann_psd(X, blocks.shape[1], fs)


def _powers(freqs: np.ndarray, psd: np.ndarray, k: int, fs: float, line: float | None,
            top: float) -> dict[str, float]:
    """Powers (unit**2) of the bands (spectrum.BANDS, mains bins taken out), of the mains hum
    and of its first harmonics, from one density PSD averaged over k blocks."""
    out: dict[str, float] = {}
    for name, (lo, hi) in sp.BANDS.items():
        hi = min(top if hi == "corner" else hi, fs / 2)
        r = sp.band_rms(freqs, psd, lo, hi, line) if hi > lo else None
        if r is not None:
            out[name] = r * r
    if line is not None:
        hum = mains.hum(freqs, psd, k_segments=k, mains_hz=line)
        out["hum_rms"] = hum.power
        for h, _, p, _ in hum.harmonics[:N_HARMONICS]:
            out[f"hum_h{h}"] = p
    return out


def _side(paths: list[Path], bases: list[Baseline], L: int, line: float | None, top: float
          ) -> Side:
    fs = bases[0].fs
    per_file = [_psd(_cut(b.blocks, L), fs) for b in bases]
    freqs = np.arange(per_file[0].shape[1]) * fs / L
    rows = np.concatenate(per_file)
    mean = rows.mean(axis=0)
    level = _powers(freqs, mean, len(rows), fs, line, top)
    if len(per_file) >= 2:
        kind, units = "files", [_powers(freqs, p.mean(axis=0), len(p), fs, line, top)
                                for p in per_file]
    else:
        kind, units = "segments", [_powers(freqs, p, 1, fs, line, top) for p in rows]
    se: dict[str, float] = {}
    for key in level:
        u = np.array([x[key] for x in units if key in x])
        m = float(u.mean()) if len(u) else 0.0
        se[key] = (_DB * float(np.std(u, ddof=1)) / (m * math.sqrt(len(u)))
                   if len(u) > 1 and m > 0 else float("nan"))
    return Side(tuple(str(p) for p in paths), bases[0].unit, fs, line, kind, len(units),
                {k: math.sqrt(max(v, 0.0)) for k, v in level.items()}, se,
                tuple(float(x) for x in freqs), tuple(float(x) for x in mean))


def _mains(freqs: np.ndarray, psd: np.ndarray, k: int) -> float:
    """50 or 60 Hz: the louder harmonic family (mains.mains_family_db, docs/methods.md §4.3)."""
    ratio = mains.mains_family_db(freqs, psd, k)
    return 50.0 if ratio >= 0 else 60.0


def _analyze_measures(paths: list[Path], channel: int, line: float | None) -> dict[str, float]:
    """Median of analyze's numeric measures of channel ``channel`` over the side's files."""
    vals: dict[str, list[float]] = {}
    rig = RigConfig("", (), mains_hz=line, channels=(channel,))   # no rig: the channel asked
                                                                  # for and the mains frequency
    for p in paths:
        fm = measure(p, rig, digest=False)
        for ch in fm.channels:
            if ch.index != channel:
                continue
            for m in ch.measures.values():
                if isinstance(m.value, (int, float)) and not isinstance(m.value, bool):
                    vals.setdefault(f"{m.name} ({m.unit})" if m.unit else m.name,
                                    []).append(float(m.value))
    return {k: float(np.median(v)) for k, v in vals.items()}


def _label(name: str, line: float | None) -> str:
    if name.startswith("hum_h"):
        h = int(name[5:])
        return f"mains {h * (line or 0.0):g} Hz" + (" (fundamental)" if h == 1 else f" (h{h})")
    return MEASURES[name].label


def compare_paths(before: Path, after: Path, *, channel: int = 0,
                  mains_hz: float | None = None) -> Comparison:
    """Compare two recordings (or two folders of them) made before and after one change."""
    sides = [_files(Path(before)), _files(Path(after))]
    bases = [[_read(p, channel) for p in paths] for paths in sides]
    first = bases[0][0]
    for paths, bs in zip(sides, bases):
        for p, b in zip(paths, bs):
            if abs(b.fs - first.fs) > 1e-6 * first.fs:
                raise QcdError(f"{p}: sampled at {b.fs:g} Hz, the others at {first.fs:g} Hz; "
                               "compare recordings made with the same settings")
            if b.unit != first.unit:
                raise QcdError(f"{p}: channel {channel} is in {b.unit}, before was in "
                               f"{first.unit}")
    fs = first.fs
    L = min(b.blocks.shape[1] for bs in bases for b in bs)
    # a single short file: cut its blocks so there are a few to vary, while bins stay narrow
    # enough for the mains harmonics
    while (min(sum(len(_cut(b.blocks, L)) for b in bs) for bs in bases) < _MIN_UNITS
           and fs / (L // 2) <= MAX_DF_HZ):
        L //= 2
    resolved = fs / L <= MAX_DF_HZ
    ref = _psd(_cut(np.concatenate([b.blocks for b in bases[0]]), L), fs)
    freqs = np.arange(ref.shape[1]) * fs / L
    mean = ref.mean(axis=0)
    line = (float(mains_hz) if mains_hz else _mains(freqs, mean, len(ref))) if resolved else None
    top = sp.corner_hz(freqs, mean, len(ref)) if len(mean) > 40 else None
    top = top if top is not None else 0.95 * fs / 2
    b, a = (_side(paths, bs, L, line, top) for paths, bs in zip(sides, bases))
    b = _with_measures(b, sides[0], channel)
    a = _with_measures(a, sides[1], channel)
    changes = []
    for k in list(b.rms):
        if k not in a.rms:
            continue
        rb, ra = b.rms[k], a.rms[k]
        if rb > 0 and ra > 0:
            db = 20 * math.log10(ra / rb)
        else:                 # a line at or below the noise floor on a side: no ratio
            db = 0.0 if ra == rb else float("nan")
        se = math.sqrt(b.se_db[k] ** 2 + a.se_db[k] ** 2)
        sig = bool(math.isfinite(se) and math.isfinite(db) and abs(db) >= MIN_DB
                   and abs(db) > SIGNIFICANCE_SIGMAS * se)
        changes.append(Change(k, _label(k, line), rb, ra, b.unit, ra - rb, db, se, sig))
    hint, mains = _hint(changes)
    if line is None:
        hint += (f" The baseline windows are too short (under 1/{MAX_DF_HZ:g} s) to resolve the "
                 f"mains harmonics, so the bands include them; record a few seconds without test "
                 f"pulses (gap-free) to see the hum.")
    return Comparison(b, a, channel, tuple(changes), hint, SAFETY_NOTE if mains else None)


def _with_measures(side: Side, paths: list[Path], channel: int) -> Side:
    return replace(side, measures=_analyze_measures(paths, channel, side.line_hz))


def _hint(changes: list[Change]) -> tuple[str, bool]:
    sig = [c for c in changes if c.significant and not c.name.startswith("hum_h")]
    if not sig:
        return ("No change exceeds the recordings' own variation: the change made no measurable "
                "difference to the noise (or the recordings are too short to tell).", False)
    # the clearest change (largest against its own uncertainty) names the source
    top = max(sig, key=lambda c: abs(c.change_db) / max(c.se_db, 1e-3))
    group = MEASURES[top.name].hint_group or "high"
    source = HINTS[group].source
    bands = [c for c in sig if c.name.startswith("band_")
             and (c.change_db > 0) == (top.change_db > 0)]
    if group != "mains" and len(bands) >= 3:
        group, source = "high", "broadband noise in every band"
    if top.change_db < 0:
        text = (f"The clearest change: {top.label} fell by {abs(top.change_db):.1f} dB. The "
                f"change you made addressed {source}.")
    else:
        text = (f"The clearest change: {top.label} rose by {top.change_db:.1f} dB. The change "
                f"you made added {source}; undo it, or check {HINTS[group].checks}.")
    return text, group == "mains"


# ------------------------------------------------------------------------------ output

def _fmt(v: float) -> str:
    if v == 0 or not math.isfinite(v):
        return f"{v:.3g}"
    return f"{v:.3g}" if abs(v) >= 1e-3 else f"{v:.2e}"


def _db(v: float, spec: str = "+.1f") -> str:
    return format(v, spec) if math.isfinite(v) else "&ndash;"


def _shared_measures(c: Comparison) -> list[tuple[str, float, float]]:
    """qcd's own file measures present on both sides, in the registry's order."""
    out = []
    for want in shown("compare"):
        for key, b in c.before.measures.items():
            if key.split(" (")[0] == want and key in c.after.measures:
                out.append((key, b, c.after.measures[key]))
    return out


def _mains_text(line: float | None) -> str:
    return f"mains {line:g} Hz" if line else "mains not resolved"


def render_compare_text(c: Comparison) -> str:
    """A compact table (fits 100 columns)."""
    u = c.before.unit
    lines = [f"before: {len(c.before.paths)} file(s), after: {len(c.after.paths)} file(s); "
             f"channel {c.channel}, {c.before.fs_hz:g} Hz, {_mains_text(c.before.line_hz)}; "
             f"variation from {c.before.units_of_variation} "
             f"(n = {c.before.n} / {c.after.n})", "",
             f"{'':28} {'before':>10} {'after':>10} {'change':>11} {'dB':>7} {'+-dB':>6}  sig",
             f"{'':28} {'RMS ' + u:>10} {'RMS ' + u:>10} {u:>11}"]
    for ch in c.changes:
        se = f"{ch.se_db:6.2f}" if math.isfinite(ch.se_db) else "     -"
        db = f"{ch.change_db:7.1f}" if math.isfinite(ch.change_db) else "      -"
        lines.append(f"{ch.label[:28]:28} {_fmt(ch.before):>10} {_fmt(ch.after):>10} "
                     f"{_fmt(ch.change):>11} {db} {se}  "
                     f"{'yes' if ch.significant else 'no'}")
    shared = _shared_measures(c)
    if shared:
        lines += ["", f"{'file measures (median over files)':40} {'before':>12} {'after':>12}"]
        for name, b, a in shared:
            lines.append(f"{name[:40]:40} {_fmt(b):>12} {_fmt(a):>12}")
    lines += [""] + textwrap.wrap(c.hint, 100)
    if c.safety_note:
        lines += textwrap.wrap(c.safety_note, 100)
    head = textwrap.wrap(lines[0], 100)
    return "\n".join(head + lines[1:])


def _row_class(ch: Change) -> str:
    """Noise and hum are better lower: a clear fall is shaded as an improvement ('better'),
    a clear rise like an alarm ('sig')."""
    if not ch.significant:
        return ""
    return "better" if ch.change_db < 0 else "sig"


def _verdict(ch: Change) -> str:
    if not ch.significant:
        return "no"
    return "yes, lower (better)" if ch.change_db < 0 else "yes, higher (worse)"


def render_compare_html(c: Comparison) -> str:
    """One self-contained HTML page: the two spectra overlaid, and the table."""
    img = spectra_figure(
        [Curve(c.before.freqs_hz, c.before.density, "before", "#4a6fa5"),
         Curve(c.after.freqs_hz, c.after.density, "after", "#c8553d")],
        unit=c.before.unit, line_hz=c.before.line_hz,
        title=f"baseline spectra before and after, channel {c.channel}")
    rows = "".join(
        f"<tr class='{_row_class(ch)}'><td>{html.escape(ch.label)}</td>"
        f"<td>{_fmt(ch.before)}</td><td>{_fmt(ch.after)}</td><td>{_fmt(ch.change)}</td>"
        f"<td>{_db(ch.change_db)}</td>"
        f"<td>{_db(ch.se_db, '.2f')}</td><td>{_verdict(ch)}</td></tr>"
        for ch in c.changes)
    safety = (f"<p class='safety'>{html.escape(c.safety_note)}</p>" if c.safety_note else "")
    shared = _shared_measures(c)
    measures = ("<table><thead><tr><th>file measure (median over files)</th><th>before</th>"
                "<th>after</th></tr></thead><tbody>" + "".join(
                    f"<tr><td>{html.escape(n)}</td><td>{_fmt(b)}</td><td>{_fmt(a)}</td></tr>"
                    for n, b, a in shared) + "</tbody></table>") if shared else ""
    files = "".join(f"<li>{side}: {html.escape(', '.join(Path(p).name for p in s.paths))}</li>"
                    for side, s in (("before", c.before), ("after", c.after)))
    body = (f"<h1>Before / after comparison</h1><ul class='meta'>{files}</ul>"
            f"<img alt='spectra before and after' src='{img}'>"
            f"<table><thead><tr><th>band or harmonic</th><th>before RMS ({c.before.unit})</th>"
            f"<th>after RMS ({c.before.unit})</th><th>change ({c.before.unit})</th>"
            f"<th>change (dB)</th><th>&plusmn; dB</th><th>beyond own variation</th></tr>"
            f"</thead><tbody>{rows}</tbody></table>"
            f"<p class='hint'>{html.escape(c.hint)}</p>{safety}{measures}")
    return page("qcd: before / after", body)
