"""Before/after comparison for the troubleshooting loop: record, change one thing, record again.

Per noise band and per mains harmonic: the change in dB and in the channel's display unit,
whether it exceeds the files' own variation (segment-to-segment within a file, or file-to-file
when folders are given), and the noise-source hint that fits. Terminal, JSON and HTML output.
Imports numpy, scipy, qcd.recording, qcd.analyze (measures table), qcd.units, qcd.report (HTML).
"""
from __future__ import annotations

import html
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from qcd.errors import QcdError, RecordingError
from qcd.intake import recordings_in
from qcd.results import SAFETY_NOTE
from qcd.units import FACTORS, channel_quantity

__all__ = ["BANDS", "Change", "Side", "Comparison", "compare_paths", "segment_powers",
           "render_compare_text", "render_compare_html", "SIGNIFICANCE_SIGMAS"]

# Noise bands (DESIGN.md measures table), mains bins removed; the top band ends at the
# channel's filter corner or at 0.45 fs.
BANDS = (("band_rms_0p5_10", 0.5, 10.0), ("band_rms_10_70", 10.0, 70.0),
         ("band_rms_70_1k", 70.0, 1000.0), ("band_rms_1k_corner", 1000.0, None))
N_HARMONICS = 5
SIGNIFICANCE_SIGMAS = 3.0      # a change counts when |change| > 3 standard errors ...
MIN_DB = 1.0                   # ... and at least 1 dB (common practice: smaller is not audible
                               # in a QC sense and within Welch bin scatter)
_SEGMENT_S = 1.0
MAX_SEGMENTS = 600             # at most 10 min of a gap-free file
MAX_DF_HZ = 2.0                # coarser Welch bins cannot separate mains harmonics from noise

_HINTS = {
    "mains": "mains hum and its harmonics: grounding, ground loops, a mains-powered device "
             "near the rig",
    "band_rms_1k_corner": "broadband high-frequency noise: headstage, pipette capacitance "
                          "(glass, coating), bath level",
    "band_rms_70_1k": "mid-band noise: headstage or pipette holder, nearby electronics",
    "band_rms_10_70": "10-70 Hz: vibration or mechanical coupling (table, perfusion pump, "
                      "manipulators)",
    "band_rms_0p5_10": "slow fluctuation: perfusion, reference electrode, temperature",
}


@dataclass(frozen=True)
class Side:
    """One side (before or after): its files and the per-unit powers (display unit squared)."""
    paths: tuple[str, ...]
    unit: str
    fs_hz: float
    line_hz: float
    units_of_variation: str                  # 'segments' | 'files'
    n: int                                   # segments or files the spread comes from
    power: dict[str, float]                  # mean power per band/harmonic
    spread_db: dict[str, float]              # SD of the per-unit dB values
    freqs_hz: tuple[float, ...] = ()
    density: tuple[float, ...] = ()          # mean PSD, unit**2/Hz
    measures: dict[str, float] = field(default_factory=dict)   # analyze's, channel `channel`


@dataclass(frozen=True)
class Change:
    name: str                 # 'band_rms_10_70' or 'hum_h1' (fundamental), 'hum_h2', ...
    label: str
    before: float             # RMS in the display unit
    after: float
    unit: str
    change: float             # after - before, display unit
    change_db: float          # 20 log10(after/before)
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
        d = asdict(self)
        for side in ("before", "after"):
            d[side].pop("freqs_hz")
            d[side].pop("density")
        return d


def _files(path: Path) -> list[Path]:
    found = recordings_in(path)
    if not found:
        raise RecordingError(path, "not_a_file", "folder holds no recordings qcd reads")
    return found


def _baseline_segments(path: Path, channel: int) -> tuple[list[np.ndarray], float, str, float]:
    """(baseline pieces in the display unit, fs, display unit, top of the last band in Hz):
    1 s blocks of a gap-free file, or each sweep's part before its first command change (or,
    without a protocol, before the step seen in the mean sweep)."""
    from qcd.recording import open_recording
    with open_recording(path) as rec:
        if channel >= len(rec.channels):
            raise RecordingError(path, "unsupported",
                                 f"has {len(rec.channels)} input channel(s), no channel {channel}")
        ch = rec.channels[channel]
        dim, factor = channel_quantity(ch.unit)
        display = {"A": "pA", "V": "mV"}.get(dim, ch.unit or "")
        fs = float(rec.fs)
        pieces: list[np.ndarray] = []
        if rec.gap_free or rec.n_sweeps == 1:
            # 1 s blocks, read chunk by chunk and at most MAX_SEGMENTS of them, so a long
            # recording never sits in memory whole
            blk = int(_SEGMENT_S * fs)
            total = int(rec.sweep_lengths[0]) if rec.sweep_lengths else 0
            if 0 < total < 4 * blk:
                blk = max(total // 4, 64)
            buf = np.empty(0)
            for chunk in rec.chunks(channel):
                buf = np.concatenate([buf, chunk])
                while len(buf) >= blk and len(pieces) < MAX_SEGMENTS:
                    pieces.append(buf[:blk].copy())
                    buf = buf[blk:]
                if len(pieces) >= MAX_SEGMENTS:
                    break
        else:
            cmd = rec.commands.get(channel) if rec.commands else None
            sweeps = [rec.sweep(channel, k) for k in range(rec.n_sweeps)]
            found = _step_onset(sweeps) if cmd is None else None
            for k, y in enumerate(sweeps):
                stop = len(y) if found is None else found
                if cmd is not None:
                    try:
                        segs = cmd.levels(k)
                        levels = [s for s in segs if s.level != segs[0].level]
                        if levels:
                            stop = int(levels[0].start)
                    except Exception:  # a protocol the reader cannot lay out: whole sweep
                        stop = len(y)
                if stop >= 64:
                    pieces.append(y[:stop])
        fc = getattr(ch, "filter_hz", None)
    si = factor if dim else 1.0
    scale = si / FACTORS.get(display, 1.0) if dim else 1.0
    return [p * scale for p in pieces], fs, display, float(fc) if fc else 0.45 * fs


def _step_onset(sweeps: list[np.ndarray]) -> int | None:
    """Without a protocol: where the mean sweep first leaves its opening level (a test step
    or stimulus), so only the samples before it count as baseline; None when it never does."""
    n = min(len(y) for y in sweeps)
    if n < 640:
        return None
    mean = np.mean([y[:n] for y in sweeps], axis=0)
    head = mean[: n // 10]
    level = float(np.median(head))
    spread = float(np.std(head)) or 1e-30
    out = np.nonzero(np.abs(mean[n // 10:] - level) > 8.0 * spread)[0]
    if not len(out):
        return None
    stop = n // 10 + int(out[0])
    return stop if stop >= 256 else None


def _find_mains(freqs: np.ndarray, psd: np.ndarray, mains_hz: float | None) -> float:
    """50 or 60 Hz by the harmonic family ratio (METHODS §4.3); the given value wins."""
    if mains_hz:
        return float(mains_hz)
    def fam(f0):
        tot = 0.0
        for h in range(1, 6):
            if (h * f0) % 300 == 0:
                continue
            sel = np.abs(freqs - h * f0) <= 2.0
            if sel.any():
                tot += float(psd[sel].max())
        return tot
    return 50.0 if fam(50.0) >= fam(60.0) else 60.0


def segment_powers(seg: np.ndarray, fs: float, line_hz: float, top_hz: float,
                   nperseg: int | None = None) -> tuple[dict[str, float], np.ndarray, np.ndarray]:
    """Band and harmonic powers (unit**2) of one baseline segment from its Welch PSD.

    Harmonic power: sum over |f - h f0| <= W of (P - floor) df, W = 3 df, floor = median of
    the bins 5-15 df away on both sides (METHODS §4.2; Welch 1967, Hann window, density
    scaling so the window ENBW is already included). Band power: sum of P df over the band
    with the harmonic bins left out.
    """
    from scipy.signal import welch
    n = len(seg)
    L = nperseg or min(n, int(round(fs * _SEGMENT_S)))
    f, p = welch(seg, fs=fs, window="hann", nperseg=L, noverlap=L // 2, detrend="linear",
                 scaling="density")
    df = f[1] - f[0]
    w = 3.0 * df
    out: dict[str, float] = {}
    mains_mask = np.zeros_like(f, dtype=bool)
    resolved = df <= MAX_DF_HZ        # harmonics 50/60 Hz apart need bins this narrow
    for h in range(1, N_HARMONICS + 1 if resolved else 1):
        fh = h * line_hz
        if fh + 15 * df >= fs / 2:
            break
        sel = np.abs(f - fh) <= w
        flank = (np.abs(f - fh) >= 5 * df) & (np.abs(f - fh) <= 15 * df)
        floor = float(np.median(p[flank])) if flank.any() else 0.0
        # never below a tenth of the floor's own power in the band, so that an absent
        # harmonic reads as "at the floor" rather than as zero (and its dB stays finite)
        floor_power = floor * df * int(sel.sum())
        out[f"hum_h{h}"] = max(float(np.sum(p[sel] - floor) * df), 0.1 * floor_power, 1e-300)
    k = 1
    while resolved and k * line_hz < fs / 2:   # every harmonic's bins leave the bands
        mains_mask |= np.abs(f - k * line_hz) <= w
        k += 1
    for name, lo, hi in BANDS:
        hi = min(hi if hi else top_hz, 0.49 * fs)
        sel = (f >= max(lo, df)) & (f < hi) & ~mains_mask
        if hi > lo and int(sel.sum()) >= 2:        # a band needs at least two bins
            out[name] = float(np.sum(p[sel]) * df)
    if resolved:
        out["hum_total"] = sum(v for key, v in out.items() if key.startswith("hum_h"))
    return out, f, p


def _side(paths: list[Path], channel: int, mains_hz: float | None) -> Side:
    per_file: list[tuple[list[dict[str, float]], np.ndarray, np.ndarray]] = []
    unit, fs, top, line = "", 0.0, 0.0, 0.0
    all_segs = []
    for path in paths:
        segs, fs_i, unit_i, top_i = _baseline_segments(path, channel)
        if not segs:
            raise RecordingError(path, "unsupported", "no baseline samples to compare")
        if fs and abs(fs_i - fs) > 1e-6 * fs:
            raise QcdError(f"{path}: sampled at {fs_i:g} Hz, the others at {fs:g} Hz; "
                           "compare recordings made with the same settings")
        fs, unit, top = fs_i, unit_i, top_i
        all_segs.append((path, segs))
    L = min(int(round(fs * _SEGMENT_S)), min(len(s) for _, ss in all_segs for s in ss))
    if mains_hz is None:
        from scipy.signal import welch
        f0, p0 = welch(np.concatenate([s for _, ss in all_segs for s in ss][:8]), fs=fs,
                       nperseg=L)
        line = _find_mains(f0, p0, None)
    else:
        line = float(mains_hz)
    for path, segs in all_segs:
        rows, fr, ps = [], None, []
        for s in segs:
            r, fr, p = segment_powers(s, fs, line, top, nperseg=L)
            rows.append(r)
            ps.append(p)
        per_file.append((rows, fr, np.mean(ps, axis=0)))
    if len(per_file) >= 2:
        units = [{k: float(np.mean([r[k] for r in rows])) for k in rows[0]}
                 for rows, _, _ in per_file]
        kind = "files"
    else:
        units = per_file[0][0]
        kind = "segments"
    keys = [k for k in units[0] if all(k in u for u in units)]
    power = {k: float(np.mean([u[k] for u in units])) for k in keys}
    spread = {}
    for k in keys:
        vals = np.array([10 * math.log10(max(u[k], 1e-300)) for u in units])
        spread[k] = float(np.std(vals, ddof=1)) if len(vals) > 1 else float("nan")
    freqs = per_file[0][1]
    dens = np.mean([d for _, _, d in per_file], axis=0)
    measures = _analyze_measures(paths, channel, line)
    return Side(tuple(str(p) for p in paths), unit, fs, line, kind, len(units), power, spread,
                tuple(float(x) for x in freqs), tuple(float(x) for x in dens), measures)


def _analyze_measures(paths: list[Path], channel: int, line: float) -> dict[str, float]:
    """Median of analyze's scalar measures over the side's files (empty when unavailable)."""
    try:
        from qcd.analyze import analyze_path
        vals: dict[str, list[float]] = {}
        for p in paths:
            fm = analyze_path(p, mains_hz=line)
            if fm.status != "ok":
                continue
            for ch in fm.channels:
                if ch.index == channel:
                    for m in ch.measures.values():
                        if isinstance(m.value, (int, float)) and not isinstance(m.value, bool):
                            vals.setdefault(f"{m.name} ({m.unit})" if m.unit else m.name,
                                            []).append(float(m.value))
        return {k: float(np.median(v)) for k, v in vals.items()}
    except NotImplementedError:
        return {}


def _label(name: str, line: float) -> str:
    if name.startswith("hum_h"):
        h = int(name[5:])
        return f"mains {h * line:g} Hz" + (" (fundamental)" if h == 1 else f" (h{h})")
    if name == "hum_total":
        return "mains, all harmonics"
    for key, lo, hi in BANDS:
        if key == name:
            return f"band {lo:g}-{hi:g} Hz" if hi else f"band {lo:g} Hz-corner"
    return name


def compare_paths(before: Path, after: Path, *, channel: int = 0,
                  mains_hz: float | None = None) -> Comparison:
    """Compare two recordings (or two folders of them) made before and after one change."""
    b = _side(_files(Path(before)), channel, mains_hz)
    a = _side(_files(Path(after)), channel, mains_hz or b.line_hz)
    if b.unit != a.unit:
        raise QcdError(f"{after}: channel {channel} is in {a.unit}, before was in {b.unit}")
    changes = []
    order = [k for k in b.power if k.startswith("band_")] + \
        [k for k in ("hum_total",) if k in b.power] + [k for k in b.power if k.startswith("hum_h")]
    for k in order:
        if k not in a.power:
            continue
        pb, pa = b.power[k], a.power[k]
        rb, ra = math.sqrt(pb), math.sqrt(pa)
        tiny = 1e-30
        db = 10 * math.log10(max(pa, tiny) / max(pb, tiny))
        sb, sa = b.spread_db.get(k, float("nan")), a.spread_db.get(k, float("nan"))
        se = math.sqrt((sb ** 2) / b.n + (sa ** 2) / a.n) if b.n > 1 and a.n > 1 else float("nan")
        sig = bool(abs(db) >= MIN_DB and (math.isnan(se) or abs(db) > SIGNIFICANCE_SIGMAS * se))
        if math.isnan(se):
            sig = False
        changes.append(Change(k, _label(k, b.line_hz), rb, ra, b.unit, ra - rb, db, se, sig))
    hint, mains = _hint(changes)
    if "hum_total" not in b.power:
        hint += (" The baseline windows are too short (under 1/{:g} s) to resolve the mains "
                 "harmonics, so the bands include them; record a few seconds without test "
                 "pulses (gap-free) to see the hum.".format(MAX_DF_HZ))
    return Comparison(b, a, channel, tuple(changes), hint, SAFETY_NOTE if mains else None)


def _hint(changes: list[Change]) -> tuple[str, bool]:
    sig = [c for c in changes if c.significant and not c.name.startswith("hum_h")]
    if not sig:
        return ("No change exceeds the recordings' own variation: the change made no measurable "
                "difference to the noise (or the recordings are too short to tell).", False)
    # the clearest change (largest against its own uncertainty) names the source
    top = max(sig, key=lambda c: abs(c.change_db) / max(c.se_db, 1e-3))
    key = "mains" if top.name.startswith("hum_") else top.name
    what = _HINTS.get(key, top.label)
    bands = [c for c in sig if c.name.startswith("band_")
             and (c.change_db > 0) == (top.change_db > 0)]
    if key != "mains" and len(bands) >= 3:
        key = "band_rms_1k_corner"
        what = "broadband noise in every band: " + _HINTS[key]
    verb = "fell" if top.change_db < 0 else "rose"
    if top.change_db < 0:
        text = (f"The clearest change: {top.label} {verb} by {abs(top.change_db):.1f} dB. The "
                f"change you made addressed {what}.")
    else:
        text = (f"The clearest change: {top.label} {verb} by {top.change_db:.1f} dB. The change "
                f"you made added {what}; undo it or look there.")
    return text, key == "mains"


def _fmt(v: float) -> str:
    if v == 0 or not math.isfinite(v):
        return f"{v:.3g}"
    return f"{v:.3g}" if abs(v) >= 1e-3 else f"{v:.2e}"


_SHOWN = ("noise_rms", "noise_rms_1k", "hum_rms", "line_hz", "holding", "seal_resistance",
          "access_resistance", "membrane_resistance", "membrane_capacitance")


def _shared_measures(c: Comparison) -> list[tuple[str, float, float]]:
    """qcd's own file measures present on both sides, in a fixed order."""
    out = []
    for want in _SHOWN:
        for key, b in c.before.measures.items():
            if key.split(" (")[0] == want and key in c.after.measures:
                out.append((key, b, c.after.measures[key]))
    return out


def render_compare_text(c: Comparison) -> str:
    """A compact table (fits 100 columns)."""
    u = c.before.unit
    lines = [f"before: {len(c.before.paths)} file(s), after: {len(c.after.paths)} file(s); "
             f"channel {c.channel}, {c.before.fs_hz:g} Hz, mains {c.before.line_hz:g} Hz; "
             f"variation from {c.before.units_of_variation} "
             f"(n = {c.before.n} / {c.after.n})", "",
             f"{'':28} {'before':>10} {'after':>10} {'change':>11} {'dB':>7} {'+-dB':>6}  sig",
             f"{'':28} {'RMS ' + u:>10} {'RMS ' + u:>10} {u:>11}"]
    for ch in c.changes:
        se = f"{ch.se_db:6.2f}" if math.isfinite(ch.se_db) else "     -"
        lines.append(f"{ch.label[:28]:28} {_fmt(ch.before):>10} {_fmt(ch.after):>10} "
                     f"{_fmt(ch.change):>11} {ch.change_db:7.1f} {se}  "
                     f"{'yes' if ch.significant else 'no'}")
    import textwrap
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


def render_compare_html(c: Comparison) -> str:
    """One self-contained HTML page: the two spectra overlaid, and the table."""
    from qcd.html import figure_data_uri, page
    import matplotlib.pyplot as plt
    fig, ax = plt.subplots(figsize=(9, 4.2), dpi=110)
    for side, name, color in ((c.before, "before", "#4a6fa5"), (c.after, "after", "#c8553d")):
        f = np.asarray(side.freqs_hz)
        d = np.asarray(side.density)
        sel = f > 0
        ax.loglog(f[sel], d[sel], color=color, lw=1.1, label=name)
    line = c.before.line_hz
    for h in range(1, N_HARMONICS + 1):
        ax.axvline(h * line, color="#999999", lw=0.6, ls=":", zorder=0)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel(f"power spectral density ({c.before.unit}\u00b2/Hz)")
    ax.set_title(f"baseline spectra, channel {c.channel}; dotted: mains harmonics of {line:g} Hz",
                 fontsize=10)
    ax.grid(True, which="major", alpha=0.3)
    ax.legend()
    fig.tight_layout()
    img = figure_data_uri(fig)
    plt.close(fig)
    rows = "".join(
        f"<tr class='{'sig' if ch.significant else ''}'><td>{html.escape(ch.label)}</td>"
        f"<td>{_fmt(ch.before)}</td><td>{_fmt(ch.after)}</td><td>{_fmt(ch.change)}</td>"
        f"<td>{ch.change_db:+.1f}</td>"
        f"<td>{ch.se_db:.2f}</td><td>{'yes' if ch.significant else 'no'}</td></tr>"
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
