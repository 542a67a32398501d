"""FileMeasures + the rig's history + Rules -> Findings, with noise-source hints (pure).

Also the drift statistics on their own: ``robust_z``, ``ewma``, ``cusum``. Imports qcd.ruleset
(rule dataclasses), qcd.results (measure registry, hints), qcd.units, qcd.measures.noise (the
MAD scale) and numpy; never reads TOML, never touches the store.
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Any, Callable, Collection, Iterable, Protocol, Sequence

import numpy as np

from qcd import charts as _charts
from qcd.measures.noise import MAD_SCALE
from qcd.results import HINTS, MEASURES, SAFETY_NOTE, ChannelMeasures, FileMeasures, Measure
from qcd.ruleset import INTAKE_RULE, HistoryRule, LimitRule, Rules
from qcd.units import DIMENSION, FACTORS, readable, readable_unit

__all__ = ["Finding", "Chart", "CusumChart", "judge", "robust_z", "baseline", "ewma",
           "ewma_limits", "cusum", "noise_hints", "channel_list"]

log = logging.getLogger(__name__)


class History(Protocol):
    """The rig's history before the file judged: ``history(mode, channel, measure)`` ->
    [(recorded_at, value)] of good files whose value of this measure was not flagged, newest
    first (qcd.pipeline.judge_file binds qcd.store.Store.history); ``clean_files=True``: only
    files with no flag at all, what the noise-source hints compare with."""

    def __call__(self, mode: str, channel: int, measure: str, *, clean_files: bool = False
                 ) -> Sequence[tuple[float, float]]: ...


# (mode, channel, measure, rule) -> the chart's reference and state before this file, or None
Charts = Callable[[str, int, str, HistoryRule], "_charts.ChartInput | None"]


@dataclass(frozen=True)
class Finding:
    """One evaluated (channel, measure, rule) of one file; ``bad`` False counts as a good file.

    ``kind`` is 'limit' (fixed limit), 'drift' (against the rig's history) or 'rig' (rig-level:
    intake errors, clipping, the learning note). ``clear`` says a good value lies beyond the
    clear level (hysteresis). Lifecycle parameters travel with the finding.
    """
    rig: str
    mode: str
    channel: int
    measure: str
    rule: str
    kind: str
    bad: bool
    severity: str
    value: float | None
    unit: str
    limit_text: str
    hint: str = ""
    clear: bool = True
    open_after_files: int = 2
    resolve_after_files: int = 3
    remind_h: float = 24.0
    learning: bool = False
    path: str = ""
    headline: str = ""           # a few words for a message title: 'below 1 GOhm', '3.1x its normal'
    channel_name: str = ""       # the channel's name (the rig's display name, else the header's)
    channels: tuple[int, ...] = ()   # file-level findings: the channels that broke the limit
    chart: dict | None = field(default=None, compare=False)  # drift charts: state to store

    @property
    def key(self) -> str:
        return f"{self.rig}|{self.mode}|{self.channel}|{self.measure}|{self.rule}"


# --- statistics ----------------------------------------------------------------------------------

def _median(x: Sequence[float]) -> float:
    """np.median of a short list, to the last bit, without numpy's overhead (a history window
    is some 30 values; numpy's per-call cost is most of the work): the middle value, or the
    mean of the two middle ones, (a + b) / 2, as numpy computes it. Lists with nan or inf
    (or none) go to numpy, for its own answer."""
    if not _finite(x):
        return float(np.median(np.asarray(x, dtype=float)))
    s = sorted(x)
    n = len(s)
    h = n // 2
    return s[h] if n % 2 else (s[h - 1] + s[h]) / 2


def _finite(x: Sequence[float]) -> bool:
    """Every value finite (a sum of finite values is never nan; one that overflows to inf
    only sends the list the numpy way, which gives the same answer)."""
    return bool(x) and math.isfinite(sum(x))


def _percentiles(x: Sequence[float], qs: Sequence[float]) -> list[float]:
    """np.percentile(x, qs) (its default 'linear' method), to the last bit: virtual index
    (n - 1) q / 100 and numpy's two-sided interpolation (``_lerp``); lists with nan or inf go
    to numpy."""
    if not _finite(x):
        return [float(v) for v in np.percentile(np.asarray(x, dtype=float), qs)]
    s = sorted(x)
    n = len(s)
    out = []
    for q in qs:
        vi = (n - 1) * (q / 100)
        if vi >= n - 1:
            out.append(s[-1])
            continue
        i = math.floor(vi)
        g = vi - i
        a, b = s[i], s[i + 1]
        d = b - a
        out.append(b - d * (1 - g) if g >= 0.5 else a + d * g)
    return out


def baseline(values: Iterable[float], *, min_spread: float = 0.0) -> tuple[float, float]:
    """(median, 1.4826 x MAD) of ``values``, the scale floored at ``min_spread`` (> 0 always)."""
    x = [float(v) for v in values]
    if not x:
        raise ValueError("baseline of no values")
    med = _median(x)
    scale = MAD_SCALE * _median([abs(v - med) for v in x])
    return med, max(scale, float(min_spread), 1e-300)


def robust_z(x: float, values: Iterable[float], *, min_spread: float = 0.0) -> float:
    """(x - median) / (1.4826 MAD) of ``values`` (Iglewicz & Hoaglin 1993)."""
    med, scale = baseline(values, min_spread=min_spread)
    return (float(x) - med) / scale


@dataclass(frozen=True)
class Chart:
    """A control chart: the statistic per point, its limits and where it signals."""
    statistic: tuple[float, ...]
    upper: tuple[float, ...]
    lower: tuple[float, ...]
    signal: tuple[bool, ...]


@dataclass(frozen=True)
class CusumChart:
    """Tabular CUSUM: S+ and S- per point and where each exceeds h."""
    upper: tuple[float, ...]
    lower: tuple[float, ...]
    signal_up: tuple[bool, ...]
    signal_down: tuple[bool, ...]


def ewma_limits(target: float, sigma: float, lam: float, L: float = 3.0,
                t: int | None = None) -> tuple[float, float]:
    """EWMA control limits; exact at point ``t`` (1-based), asymptotic when ``t`` is None.

    target +- L sigma sqrt(lam/(2-lam) (1-(1-lam)^(2t))) (NIST/SEMATECH e-Handbook 6.3.2.4).
    """
    w = lam / (2.0 - lam)
    if t is not None:
        w *= 1.0 - (1.0 - lam) ** (2 * t)
    half = L * sigma * math.sqrt(w)
    return target + half, target - half


def ewma(x: Iterable[float], lam: float, *, target: float, sigma: float, L: float = 3.0,
         start: float | None = None, exact: bool = True) -> Chart:
    """z_t = lam x_t + (1-lam) z_(t-1), z_0 = ``start`` (default ``target``) (Roberts 1959)."""
    z = target if start is None else float(start)
    stat, up, lo, sig = [], [], [], []
    for t, xi in enumerate(x, start=1):
        z = lam * float(xi) + (1.0 - lam) * z
        u, low = ewma_limits(target, sigma, lam, L, t if exact else None)
        stat.append(z)
        up.append(u)
        lo.append(low)
        sig.append(z > u or z < low)
    return Chart(tuple(stat), tuple(up), tuple(lo), tuple(sig))


def cusum(x: Iterable[float], target: float, k: float, h: float) -> CusumChart:
    """Tabular CUSUM (Page 1954): S+ = max(0, S+ + x - target - k), S- = max(0, S- + target - k - x)."""
    sp = sm = 0.0
    up, lo, su, sd = [], [], [], []
    for xi in x:
        sp = max(0.0, sp + float(xi) - target - k)
        sm = max(0.0, sm + target - k - float(xi))
        up.append(sp)
        lo.append(sm)
        su.append(sp > h)
        sd.append(sm > h)
    return CusumChart(tuple(up), tuple(lo), tuple(su), tuple(sd))


# --- noise-source hints -------------------------------------------------------------------------

_MAINS = "mains"
_BROAD = "broad"
# measure -> hint group, and the noise measures (a bad one gets a hint): qcd.results.MEASURES
_HINT_MEASURES = {name: m.hint_group for name, m in MEASURES.items() if m.hint_group}
_NOISE_MEASURES = {name for name, m in MEASURES.items() if m.noise}
_BANDS = ("band_rms_0p5_10", "band_rms_10_70", "band_rms_70_1k", "band_rms_1k_corner")


def _number(v: Any) -> float | None:
    """A finite float of a measure value; None for bools, lists, text and NaN."""
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    v = float(v)
    return v if math.isfinite(v) else None


_GROWN_Z = 3.0          # a band "grew" at robust z > 3 on log values ...
_GROWN_RATIO = 1.5      # ... and at least 1.5x its median (common practice, not a published rule)
_SE_SIGMAS = 2.0        # a value with a standard error counts as its value -+ 2 SE
# The hum hint asks on every bad noise file whether the hum itself grew: its reading counts by
# the lower bound of its power 3 standard errors down (one-sided 0.13 % for a normal error;
# the short-window hum fit's error has a heavier tail, about 0.3 % beyond 3 SE and 0.03 %
# beyond 4 SE in simulation under a 3.5x broadband floor), so a fault of dozens of files does
# not show a wrong grounding hint now and then. METHODS §4.5.
_HUM_SIGMAS = 3.0


def _se(ch: Any, name: str) -> float:
    """The standard error a channel reports beside a measure (``<name>_se``), else 0."""
    m = ch.measures.get(f"{name}_se")
    v = _number(m.value) if m is not None else None
    return v if v is not None and v > 0 else 0.0


def _rms_lower(rms: float, rms_se: float, sigmas: float) -> float:
    """The RMS at the power ``sigmas`` standard errors below a reading, at least 0.

    ``rms_se`` is a hum-like error: how far one standard error of the power moves the RMS up,
    sqrt(P + se_P) - sqrt(P) (qcd.measures.mains.Hum.rms_se), so se_P = (rms + rms_se)^2 - rms^2.
    The bound is taken on the power, where the error is symmetric: on the RMS scale a step down
    is longer than the step up (sqrt is concave), and rms - k rms_se would sit short of k
    standard errors."""
    p = rms * rms
    se_p = (rms + rms_se) ** 2 - p
    return math.sqrt(max(p - sigmas * se_p, 0.0))


def _rms_upper(rms: float, rms_se: float, sigmas: float) -> float:
    """The RMS at the power ``sigmas`` standard errors above a reading (``_rms_lower``'s
    mate): sqrt(P + sigmas se_P)."""
    p = rms * rms
    return math.sqrt(p + sigmas * ((rms + rms_se) ** 2 - p))


# measures whose standard error is a power's, moved to the RMS (qcd.measures.mains.Hum.rms_se):
# their interval is taken on the power, where the error is symmetric (METHODS §4.5)
_POWER_SE = frozenset({"hum_rms"})


def _ends(value: float, se: float, power: bool = False) -> tuple[float, float]:
    """(low, high) of a value -+ 2 standard errors; ``power``: an RMS whose error is its
    power's, so the ends are sqrt(P -+ 2 se_P) (the low end at least 0)."""
    if power and value >= 0:
        return _rms_lower(value, se, _SE_SIGMAS), _rms_upper(value, se, _SE_SIGMAS)
    return value - _SE_SIGMAS * se, value + _SE_SIGMAS * se


def _ratio(value: float, past: list[float]) -> tuple[float, bool] | None:
    """(value / median of past, grown): grown at robust z > 3 on logs and >= 1.5x the median."""
    past = [v for v in past if v > 0]
    if value <= 0 or len(past) < 3:
        return None
    med = _median(past)
    z = robust_z(math.log(value), [math.log(v) for v in past], min_spread=0.05)
    return value / med, bool(z > _GROWN_Z and value >= _GROWN_RATIO * med)


def _hint_text(groups: Sequence[str]) -> str:
    if not groups:
        return ""
    text = "Possible source (a check to make, not a diagnosis): " + "; ".join(
        HINTS[g].text for g in groups) + "."
    if _MAINS in groups:
        text += " " + SAFETY_NOTE
    return text


def noise_hints(ch: ChannelMeasures, mode: str, history: History, rules: Rules
                ) -> list[str]:
    """Hint groups of what grew against the rig's history, biggest growth first.

    Like is compared with like: when the noise floor rose in (nearly) every band together, that
    is one broadband change (headstage, pipette, bath), and a band or the drift counts on its
    own only where it grew 1.5x beyond that common factor. Mains hum counts only by the lower
    bound of its power, 3 standard errors down (hum_rms_se; the error comes from the noise
    floor beside the harmonics), so a rising floor alone cannot make the hum look grown, not
    even now and then over a fault of many files."""
    n_hist = rules.settings.history_files

    def past(name: str) -> list[float]:
        vals = _precise(history, mode, ch, name, n_hist, side="up")
        return [abs(v) for v in vals] if name == "baseline_drift" else vals

    def value(name: str) -> float | None:
        m = ch.measures.get(name)
        v = _number(m.value) if m is not None else None
        return abs(v) if v is not None and name == "baseline_drift" else v

    grown: dict[str, float] = {}
    lines = ch.measures.get("spectral_lines")
    noise = value("noise_rms")
    if lines is not None and isinstance(lines.value, (list, tuple)) and noise:
        # strongest non-mains line carrying >= 30 % of the baseline RMS (common practice)
        rms = [float(x[1]) for x in lines.value if isinstance(x, (list, tuple)) and len(x) >= 2]
        if rms and max(rms) >= 0.3 * noise:
            grown["lines"] = _GROWN_RATIO
    bands: dict[str, tuple[float, bool]] = {}
    for name in _BANDS + ("baseline_drift",):
        v = value(name)
        r = _ratio(v, past(name)) if v is not None else None
        if r is not None:
            bands[name] = r
    spectral = {k: r for k, r in bands.items() if k != "baseline_drift"}
    up = [r for r, g in spectral.values() if g]
    common = 1.0
    if len(spectral) >= 3 and len(up) >= max(2, len(spectral) - 1):
        common = _median(up)
        grown[_BROAD] = common
    for name, (r, g) in bands.items():
        if g and r / common >= _GROWN_RATIO:
            group = _HINT_MEASURES[name]
            grown[group] = max(grown.get(group, 0.0), r / common)
    hum = value("hum_rms")
    if hum is not None:
        r = _ratio(_rms_lower(hum, _se(ch, "hum_rms"), _HUM_SIGMAS), past("hum_rms"))
        if r is not None and r[1]:
            grown[_MAINS] = r[0]
    return sorted(grown, key=lambda g: -grown[g])[:3]     # biggest growth first


# --- the judge ---------------------------------------------------------------------------------

def _values(rows: Iterable[Any], limit: int) -> list[float]:
    """Finite values of history rows (newest first), at most ``limit``, returned oldest first."""
    rows = sorted(rows, key=lambda r: -float(r[0]))[:limit]
    out = []
    for r in reversed(rows):
        try:
            v = float(r[1])
        except (TypeError, ValueError):
            continue
        if math.isfinite(v):
            out.append(v)
    return out


_IMPRECISE = 3.0       # a past value 3x less precise than the rig's usual stays out of the reference


def _clean(history: History) -> History:
    """The history of files with no flag at all: the noise-source hints compare with those,
    so a fault that lasts longer than the window does not become the normal its own hint is
    measured against. This view is clean whatever ``clean_files`` it is called with."""
    def clean(mode: str, channel: int, measure: str, *, clean_files: bool = True
              ) -> Sequence[tuple[float, float]]:
        return history(mode, channel, measure, clean_files=True)
    return clean


def _precise(history: History, mode: str, ch: ChannelMeasures, name: str, limit: int,
             side: str = "both") -> list[float]:
    """``_values`` of a measure's history; for a measure that carries a standard error
    (``<name>_se``), compared like with like:

    - values measured with 3x the history's median error or more are left out: a reading
      taken while the noise floor was high says little about the rig's normal, and would carry
      that floor into the reference and the drift charts;
    - for an upward test each past value counts as its upper bound, value + 2 SE (what the
      rig's normal could have been), for a downward test as its lower bound; a rise must then
      clear what the floor allowed before, not only the values the noise happened to give."""
    rows = list(history(mode, ch.index, name))
    if f"{name}_se" in ch.measures and rows:
        se = {float(t): float(v) for t, v in history(mode, ch.index, f"{name}_se")}
        errs = [se[float(r[0])] for r in rows if float(r[0]) in se]
        if errs:
            cap = _IMPRECISE * _median(errs)
            rows = [r for r in rows if se.get(float(r[0]), 0.0) < cap or cap <= 0]
            sign = {"up": 1.0, "down": -1.0}.get(side, 0.0)
            rows = [(r[0], float(r[1]) + sign * _SE_SIGMAS * se.get(float(r[0]), 0.0))
                    for r in rows]
    return _values(rows, limit)


def _matches(modes: tuple[str, ...], mode: str) -> bool:
    return "*" in modes or mode in modes


def _to_si(value: float, unit: str) -> tuple[float, str]:
    canon = unit if unit in FACTORS else ""
    return float(value) * FACTORS.get(canon, 1.0), DIMENSION.get(canon, "")


def _limit(rule: LimitRule, m: Measure) -> tuple[bool, bool] | None:
    """(bad, clear) for one measure against a fixed limit; None when the rule cannot apply."""
    if not isinstance(m.value, (bool, int, float)):
        return None
    if rule.equals is not None:
        is_true = bool(m.value)
        return is_true == rule.equals, is_true != rule.equals
    if isinstance(m.value, bool):
        v, dim = float(m.value), ""
    elif rule.dimension:
        v, dim = _to_si(m.value, m.unit)
        if dim != rule.dimension:
            log.warning("rule %s: %s is in %r, the limit in %r; rule skipped",
                        rule.name, m.name, m.unit, rule.dimension)
            return None
    else:
        v = float(m.value)
    if not math.isfinite(v):
        return None
    if rule.absolute:
        v = abs(v)
    bad = (rule.above is not None and v > rule.above) or (rule.below is not None and v < rule.below)
    clear_ok = not bad
    if rule.above is not None:
        clear_ok &= v <= rule.above - rule.clear_margin * abs(rule.above)
    if rule.below is not None:
        clear_ok &= v >= rule.below + rule.clear_margin * abs(rule.below)
    return bad, clear_ok


def _drift(rule: HistoryRule, value: float, past: list[float], unit: str = "",
           ref_scale: float = 0.0) -> tuple[bool, bool, str] | None:
    """(bad, clear, text) for one value against the history values (oldest first): robust z
    against their median and scale. ``ref_scale``: the scale of the rig's reference (same
    scale: log or not) floors the window's, which a few days of files can make far too small
    when files of one day share its conditions (docs/methods.md §7)."""
    abs_floor = 0.0
    if rule.min_spread_abs is not None and not rule.log:
        si, dim = _to_si(1.0, unit)
        if rule.spread_dimension and dim != rule.spread_dimension:
            log.warning("rule %s: spread floor in %r, the measure in %r; rule skipped",
                        rule.name, rule.spread_dimension, unit)
            return None
        abs_floor = rule.min_spread_abs / si
    if rule.log:
        if value <= 0:
            return None
        past = [math.log(v) for v in past if v > 0]
        x = math.log(value)
    else:
        x = value
    if len(past) < 3:
        return None
    med, scale = baseline(past)
    floor = rule.min_spread if rule.log else max(rule.min_spread * abs(med), abs_floor)
    scale = max(scale, floor, ref_scale, 1e-300)
    up, down = rule.side in ("up", "both"), rule.side in ("down", "both")
    z = (x - med) / scale
    bad = (up and z > rule.z) or (down and z < -rule.z)
    clear_ok = not bad and (not up or z < rule.clear_z) and (not down or z > -rule.clear_z)
    return bad, clear_ok, f"robust z {z:+.1f} (flag beyond {rule.z:g})"


def _chart(rule: HistoryRule, value: float, ci: _charts.ChartInput, unit: str, key: dict,
           jumped: bool = False, se: float = 0.0, power: bool = False
           ) -> tuple[bool, bool, str, str, dict] | None:
    """(bad, clear, text, headline, chart to store) of one file on a sequential chart.

    ``jumped``: a jump rule (robust z, or a step chart) flagged this value. It is charted, but
    the chart is held at its clear level (``charts.hold``), so that a few outliers alone cannot
    open a drift alert after the jump's alert has resolved; a drift that goes on takes the
    chart up again. ``se``: the value's standard error; as for the other rules
    (``_interval``), the chart is bad only when it would be bad for every value within
    -+ 2 SE, and clear only when clear for all of them (the stored chart steps the value);
    ``power``: the SE is a power's (``_ends``)."""
    store = dict(key, start_at=ci.start_at, state=ci.state.to_dict(),
                 ref=None if ci.ref is None or ci.provisional else ci.ref.to_dict())
    if ci.ref is None:
        return False, True, ci.learning, "", store
    x = _charts.standardise(value, ci.ref, rule)
    if x is None:
        return None
    new = _charts.step(rule, ci.state, x, ci.at)
    bad, clear, stat, lim = _charts.verdict(rule, new)
    if se > 0 and (bad or not clear):
        for end in _ends(value, se, power):
            xe = _charts.standardise(max(end, 1e-300) if value > 0 else end, ci.ref, rule)
            if xe is not None:
                b, c, _, _ = _charts.verdict(rule, _charts.step(rule, ci.state, xe, ci.at))
                bad, clear = bad and b, clear and c
    if jumped:
        new = _charts.hold(rule, new)
    store["state"] = _charts.replay(rule, new, ci.tail, ci.ref).to_dict()
    ref = ci.ref
    med = ref.median
    where = f"reference median {readable(med, unit)} from {ref.n} files"
    if rule.test == "ewma":
        sd = math.sqrt(rule.lam / (2.0 - rule.lam))
        stat_text = f"EWMA {stat / sd:.1f} sigma, limit {lim / sd:.1f}"
    else:
        stat_text = f"CUSUM {stat:.1f} sigma, limit {lim:.1f}"
    ratio = (f"{value / med:.2g}x its reference median" if ref.log and med > 0 else
             f"{_offset(value, med, unit)} from its reference median")
    text = f"{ratio} of {_charts.span_text(ref)} / {stat_text}; {where}"
    if ci.provisional:
        text += (f"; provisional reference, limit widened {ref.widen:.2g}x while "
                 f"{ci.learning}")
    return bad, clear, text, ratio, store


def _with(m: Measure, value: float) -> Measure:
    """The measure ``m`` with another value (same name and unit)."""
    return Measure(m.name, value, m.unit)


def _interval(evaluate: Callable[[float], tuple | None], m: Measure, se: float,
              absolute: bool = False) -> tuple | None:
    """evaluate(value) -> (bad, clear, ...); with a standard error the whole interval
    value -+ 2 SE must be bad to count as bad, and all of it clear to count as clear (a value
    its own noise could have moved across the limit is neither). ``absolute``: the rule
    compares |value|, so the interval is taken of |value| (from 0 when it spans zero). A
    measure whose error is a power's (``_POWER_SE``: the hum RMS) takes its interval on the
    power, sqrt(P -+ 2 se_P) (``_ends``). Other fields come from the value itself."""
    if isinstance(m.value, bool) or _number(m.value) is None:
        return evaluate(m.value)
    point = evaluate(float(m.value))
    if point is None or not se:
        return point
    v = float(m.value)
    low, high = _ends(v, se, m.name in _POWER_SE and not absolute)
    if absolute:
        low, high = (0.0 if low <= 0 <= high else min(abs(low), abs(high))), \
            max(abs(low), abs(high))
    elif v > 0:
        low = max(low, 1e-300)           # a positive measure: its interval stays positive
    ends = [evaluate(low), evaluate(high)]
    if any(e is None for e in ends):
        return point
    bad = all(e[0] for e in ends)
    clear = all(e[1] for e in ends)
    return (bad, clear) + tuple(point[2:])


def _offset(value: float, med: float, unit: str) -> str:
    """'+1.2 uV': a value's distance from a median, signed, in the unit that reads best."""
    return f"{'+' if value >= med else '-'}{readable(abs(value - med), unit)}"


def _normal_range(past: list[float], unit: str) -> str:
    """'normal 2.93-3.86 uV (median 3.25, 24 files)': in the unit that reads best for the
    median (the stored unit of a field channel is mV; its hum is a few uV), as the report."""
    lo, hi = _percentiles(past, (10, 90))
    med = _median(past)
    shown, f = readable_unit(med, unit)
    return (f"normal {lo * f:.3g}-{hi * f:.3g} {shown} (median {med * f:.3g}, "
            f"{len(past)} files)").replace("  ", " ")


def _headline(rule: LimitRule) -> str:
    """The limit in a few words for a title: 'below 1 GOhm', 'more than 200 pA from zero'."""
    if rule.absolute and rule.text.startswith("|value| above "):
        return f"more than {rule.text[len('|value| above '):]} from zero"
    return rule.text


def _named(ch: ChannelMeasures) -> str:
    """The channel's name, '' when the header gives none ('?')."""
    return "" if ch.name in ("", "?") else ch.name


def channel_list(channels: Sequence[tuple[int, str]], of: int | None = None) -> str:
    """'channel 1 (Current 1)', 'channels 0 (V1), 3 (I2)', 'channels 0-6, 9 (8 of 16)'."""
    items = sorted(channels)
    if len(items) == 1:
        i, name = items[0]
        return f"channel {i}" + (f" ({name})" if name else "")
    if len(items) <= 4:
        return "channels " + ", ".join(f"{i} ({n})" if n else str(i) for i, n in items)
    runs: list[list[int]] = []
    for i, _ in items:
        if runs and i == runs[-1][-1] + 1:
            runs[-1].append(i)
        else:
            runs.append([i])
    spans = ", ".join(f"{r[0]}-{r[-1]}" if len(r) > 1 else str(r[0]) for r in runs)
    total = "" if of is None else f" of {of}" if of > len(items) else ", all watched"
    return f"channels {spans} ({len(items)}{total})"


def _file_finding(rule: LimitRule, results: list[tuple[ChannelMeasures, Measure, bool, bool]],
                  rig_name: str, mode: str, path: str) -> Finding:
    """One finding for a file-level limit: bad when any channel broke it, clear when all are
    clear; the value is the worst channel's, the text names the channels that broke it."""
    bad = [r for r in results if r[2]]
    pool = bad or results

    def worst(r: tuple[ChannelMeasures, Measure, bool, bool]) -> float:
        v = float(r[1].value)
        v = abs(v) if rule.absolute else v
        return -v if rule.below is not None and rule.above is None else v
    ch, m = max(pool, key=worst)[:2]
    where = channel_list([(r[0].index, _named(r[0])) for r in bad], len(results)) if bad else ""
    return Finding(
        rig=rig_name, mode=mode, channel=-1, measure=rule.measure, rule=rule.name,
        kind="rig" if rule.scope == "rig" else "limit", bad=bool(bad), severity=rule.severity,
        value=float(m.value), unit=m.unit,
        limit_text=f"{rule.text} on {where}" if bad else rule.text,
        clear=all(r[3] for r in results),
        open_after_files=rule.open_after_files, resolve_after_files=rule.resolve_after_files,
        remind_h=rule.remind_h, path=path,
        headline=f"{_headline(rule)} on {where}" if bad else _headline(rule),
        channels=tuple(sorted(r[0].index for r in bad)))


def _overlap(a: str, b: str) -> bool:
    """Two rules' sides watch a common direction ('up', 'down' or 'both')."""
    return a == b or "both" in (a, b)


def judge(fm: FileMeasures, rig_name: str, history: History, rules: Rules, now: float,
          charts: Charts | None = None,
          open_alerts: Collection[tuple[str, int, str, str]] = ()) -> list[Finding]:
    """Every evaluated (channel, measure, rule) of one file as a Finding, plus rig-level ones.

    ``history(mode, channel, measure)`` gives the rig's [(recorded_at, value)] of good,
    unflagged files before this one (the 'z' rules' window); with ``clean_files=True`` only
    files with no flag at all (the hints' comparison; see History). ``charts(mode, channel,
    measure, rule)`` gives an 'ewma'/'cusum' rule's reference and chart before this file
    (qcd.charts.ChartInput); their findings carry the chart after it (``Finding.chart``).
    Without ``charts`` the sequential rules are not evaluated.

    ``open_alerts``: (mode, channel, measure, rule) of the history alerts open before this
    file. One alert per measure and side: the rule holding an open alert carries its episode to
    the end (a robust-z rule keeps flagging even where a learned step chart would stand it
    down), and another rule of that measure and side that flags a file yields to it, neither
    bad nor clear, its chart held at its clear level (docs/methods.md §7).
    """
    st = rules.settings
    path = str(fm.path)
    intake = dict(rig=rig_name, mode="*", channel=-1, measure="file", rule=INTAKE_RULE,
                  kind="rig", severity="warning", unit="",
                  open_after_files=st.intake_open_after_files,
                  resolve_after_files=st.resolve_after_files, remind_h=st.remind_h, path=path)
    if fm.status != "ok":
        kind = fm.error_kind or "error"
        said = "could not be measured" if kind == "internal" else "could not be read"
        return [Finding(bad=True, value=None, clear=False,
                        limit_text=f"file not measured ({kind})",
                        headline=f"{said}: {kind.replace('_', ' ')}",
                        hint=fm.error or "", **intake)]
    out = [Finding(bad=False, value=None, limit_text="file measured", **intake)]
    mode = fm.mode
    seen = 0
    per_file: dict[str, list[tuple[ChannelMeasures, Measure, bool, bool]]] = {}
    for ch in fm.channels:
        groups = None
        for m in ch.measures.values():
            for rule in rules.limits:
                if rule.measure != m.name or not _matches(rule.modes, mode):
                    continue
                res = _interval(lambda x: _limit(rule, _with(m, x)), m, _se(ch, m.name),
                                rule.absolute)
                if res is None:
                    continue
                bad, clear_ok = res[:2]
                if rule.scope != "measure":         # one finding per file, after the channels
                    per_file.setdefault(rule.name, []).append((ch, m, bad, clear_ok))
                    continue
                hint = ""
                if bad and m.name in _NOISE_MEASURES:
                    groups = noise_hints(ch, mode, _clean(history), rules) if groups is None else groups
                    g = groups or ([_HINT_MEASURES[m.name]] if m.name in _HINT_MEASURES else [])
                    hint = _hint_text(g)
                out.append(Finding(
                    rig=rig_name, mode=mode, channel=ch.index, measure=m.name, rule=rule.name,
                    kind="rig" if rule.scope == "rig" else "limit", bad=bad,
                    severity=rule.severity,
                    value=float(m.value),
                    unit=m.unit, limit_text=rule.text, hint=hint, clear=clear_ok,
                    open_after_files=rule.open_after_files,
                    resolve_after_files=rule.resolve_after_files,
                    remind_h=rule.remind_h, path=path, headline=_headline(rule),
                    channel_name=_named(ch)))
            hist_rules = [r for r in rules.history
                          if r.measure == m.name and _matches(r.modes, mode)]
            if not hist_rules or _number(m.value) is None:
                continue
            points = _precise(history, mode, ch, m.name, st.history_files)
            seen = max(seen, len(points))
            past = points
            learning = len(past) < st.learning_files
            value = float(m.value)
            if not math.isfinite(value):
                continue
            jump = ""
            inputs = {r.name: charts(mode, ch.index, m.name, r) for r in hist_rules
                      if charts is not None and r.test in _charts.CHART_TESTS}
            refs = {ci.ref.log: ci.ref.scale for ci in inputs.values()     # learned ones
                    if ci is not None and ci.ref is not None and not ci.provisional}
            # a step chart with a learned reference takes over from the jump rules of its side
            stood_down = {r.side for r in hist_rules if r.step and inputs.get(r.name) is not None
                          and inputs[r.name].ref is not None and not inputs[r.name].provisional}
            if "both" in stood_down:
                stood_down |= {"up", "down"}
            # the rules of this measure holding an open alert: one alert per measure and side
            held = [r for r in hist_rules if (mode, ch.index, m.name, r.name) in open_alerts]

            def holder(rule: HistoryRule) -> str:
                return next((r.name for r in held if r is not rule and _overlap(r.side, rule.side)
                             ), "")
            # z rules first, then step charts, then drift charts: what flags first is "the jump"
            for rule in sorted(hist_rules, key=lambda r: (r.test != "z", not r.step)):
                chart_row, headline = None, ""
                other = holder(rule)
                if rule.test in _charts.CHART_TESTS:
                    ci = inputs.get(rule.name)
                    if ci is None:
                        continue
                    res = _chart(rule, value, ci, m.unit,
                                 dict(mode=mode, channel=ch.index, measure=m.name,
                                      rule=rule.name), jumped=bool(jump or other),
                                 se=_se(ch, m.name), power=m.name in _POWER_SE)
                    if res is None:
                        continue
                    bad, clear_ok, stat_text, headline, chart_row = res
                    if ci.ref is None:
                        out.append(Finding(
                            rig=rig_name, mode=mode, channel=ch.index, measure=m.name,
                            rule=rule.name, kind="drift", bad=False, severity=rule.severity,
                            value=value, unit=m.unit, limit_text=stat_text, clear=True,
                            open_after_files=rule.open_after_files,
                            resolve_after_files=rule.resolve_after_files,
                            remind_h=rule.remind_h, learning=True, path=path,
                            channel_name=_named(ch), chart=chart_row))
                        continue
                else:
                    ref = _precise(history, mode, ch, m.name, st.history_files, rule.side) \
                        if _se(ch, m.name) else points
                    res = _interval(lambda x: _drift(rule, x, ref, m.unit,
                                                     refs.get(rule.log, 0.0)),
                                    m, _se(ch, m.name))
                    if res is None:
                        continue
                    bad, clear_ok, stat_text = res
                    if rule.side in stood_down and rule not in held:
                        bad, clear_ok = False, True
                        stat_text += " (stands down: the step chart watches for jumps)"
                if bad and jump and rule.test != "z":
                    # a jump already flagged explains the trend statistic: one alert, not two;
                    # neither bad nor clear, so an open trend alert neither grows nor clears
                    bad = clear_ok = False
                    stat_text += f" (a jump, flagged by {jump})"
                elif bad and other:
                    # another rule of this measure and side holds the open alert: one alert,
                    # not two across files; neither bad nor clear, so this rule's own alert
                    # neither opens nor resolves while that episode lasts
                    bad = clear_ok = False
                    stat_text += f" (the open {other} alert covers it)"
                elif bad and (rule.test == "z" or rule.step):
                    jump = jump or rule.name
                hint = ""
                if bad and m.name in _NOISE_MEASURES:
                    groups = noise_hints(ch, mode, _clean(history), rules) if groups is None else groups
                    g = groups or ([_HINT_MEASURES[m.name]] if m.name in _HINT_MEASURES else [])
                    hint = _hint_text(g)
                if chart_row is not None:
                    text = stat_text
                else:
                    text = f"{_normal_range(past, m.unit)}; {stat_text}"
                    med = _median(past)
                    headline = (f"{value / med:.2g}x its normal" if med > 0 and value > 0 else
                                f"{_offset(value, med, m.unit)} from its normal")
                    if learning:
                        text += f"; learning ({len(past)} of {st.learning_files} files)"
                out.append(Finding(
                    rig=rig_name, mode=mode, channel=ch.index, measure=m.name, rule=rule.name,
                    kind="drift", bad=bad, severity=rule.severity, value=value, unit=m.unit,
                    limit_text=text, hint=hint, clear=clear_ok,
                    open_after_files=rule.open_after_files,
                    resolve_after_files=rule.resolve_after_files, remind_h=rule.remind_h,
                    learning=learning and chart_row is None, path=path, headline=headline,
                    channel_name=_named(ch), chart=chart_row))
    for rule in rules.limits:
        if rule.name in per_file:
            out.append(_file_finding(rule, per_file[rule.name], rig_name, mode, path))
    if rules.history and seen < st.learning_files:
        out.append(Finding(rig=rig_name, mode=mode, channel=-1, measure="files", rule="learning",
                           kind="rig", bad=False, severity="info", value=float(seen), unit="",
                           limit_text=f"learning: {seen} of {st.learning_files} files",
                           hint=f"learning: {seen} of {st.learning_files} files; history "
                                f"checks are provisional and send no messages yet",
                           learning=True, path=path))
    return out
