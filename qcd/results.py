"""What a measured file is: FileMeasures and its parts, and the registry of measure names.

``MEASURES`` is the one table of measure names: dimension, display unit, label, the noise
source a growth points at, and where the measure is shown. The dataclasses are what every
stage after analyze consumes (store, judge, report, compare, scan --json).
Imports qcd.units and numpy.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import numpy as np

from qcd import units

__all__ = ["MODES", "Measure", "Spectrum", "ChannelMeasures", "FileMeasures", "MeasureInfo",
           "MEASURES", "Hint", "HINTS", "SAFETY_NOTE", "display_unit", "shown", "file_time"]

# Recording modes, stored as files.mode and used by rules as [mode] tables.
MODES = ("voltage_clamp", "current_clamp", "extracellular", "unknown")

SAFETY_NOTE = ("Safety: follow your institution's electrical-safety rules and local codes; never "
               "open mains-powered equipment; leave building wiring and earth to a qualified, "
               "licensed electrician.")


# ------------------------------------------------------------------------- the measure registry

@dataclass(frozen=True)
class Hint:
    """A likely noise source: what grew, and the checks that go with it."""
    source: str
    checks: str
    change: str = "grew"

    @property
    def text(self) -> str:
        """'mains hum and its harmonics grew: check the grounding ...'."""
        return f"{self.source} {self.change}: check {self.checks}"


# Noise-source groups (DESIGN: which bands grew); "mains" hints carry SAFETY_NOTE.
HINTS: dict[str, Hint] = {
    "mains": Hint("mains hum and its harmonics",
                  "the grounding (a single ground point, no ground loops, a loose or corroded "
                  "ground lead, the bath ground) and any mains-powered device newly placed near "
                  "the rig", "grew beyond what the noise floor near them explains"),
    "broad": Hint("the noise floor",
                  "the headstage and its connector, the pipette (capacitance: glass, coating, "
                  "fill level) and the bath level", "rose across the spectrum (broadband)"),
    "high": Hint("broadband high-frequency noise",
                 "the headstage and its connector, the pipette capacitance (glass, coating, "
                 "fill) and the bath level"),
    "mid": Hint("mid-band noise",
                "the headstage, the pipette holder and electronics newly placed near the rig"),
    "mech": Hint("noise at 10-70 Hz",
                 "for vibration (air table, pumps, manipulators, building work) and mechanical "
                 "coupling to the rig"),
    "lines": Hint("narrow spectral lines that are not mains harmonics",
                  "switching power supplies, displays, LED drivers and chargers near the rig",
                  "appeared"),
    "low": Hint("slow fluctuation and drift",
                "the perfusion (flow, bubbles, bath level), the reference electrode and the "
                "temperature"),
}


@dataclass(frozen=True)
class MeasureInfo:
    """One measure name's facts.

    ``dimension``: 'signal' is the channel's own quantity (A in voltage clamp, V otherwise),
    'signal/s' its rate; else an SI dimension of qcd.units ('Ohm', 'F', 's', 'Hz', '%') or ''
    for plain numbers, counts and flags. ``display_unit`` overrides the dimension's usual unit.
    ``noise``: a noise measure (a bad value gets a noise-source hint). ``show``: where it is
    shown ('report' table, 'plot' trend plot, 'compare' file-measures table). ``log_axis``:
    values may span decades (plotted on a log axis when they do).
    """
    dimension: str
    label: str
    display_unit: str = ""
    hint_group: str | None = None
    noise: bool = False
    show: tuple[str, ...] = ()
    log_axis: bool = False


_SIG = "signal"
MEASURES: dict[str, MeasureInfo] = {
    "noise_rms": MeasureInfo(_SIG, "baseline RMS noise", noise=True,
                             show=("report", "plot", "compare")),
    "noise_rms_1k": MeasureInfo(_SIG, "RMS noise, 1 kHz band", noise=True,
                                show=("report", "plot", "compare")),
    "noise_pp": MeasureInfo(_SIG, "peak-to-peak noise", noise=True),
    "pp_over_rms": MeasureInfo("", "peak-to-peak over RMS", noise=True),
    "event_blocks": MeasureInfo("", "blocks left out for events"),
    "line_hz": MeasureInfo("Hz", "mains frequency", show=("compare",)),
    "hum_rms": MeasureInfo(_SIG, "mains hum RMS", hint_group="mains", noise=True,
                           show=("report", "plot", "compare"), log_axis=True),
    "hum_rms_se": MeasureInfo(_SIG, "standard error of the hum RMS"),
    "hum_rms_max": MeasureInfo(_SIG, "upper bound on the mains hum", hint_group="mains",
                               noise=True),
    "hum_fundamental_rms": MeasureInfo(_SIG, "mains fundamental RMS", hint_group="mains",
                                       noise=True),
    "hum_fraction": MeasureInfo("", "hum share of the baseline variance", hint_group="mains",
                                noise=True),
    "band_rms_0p5_10": MeasureInfo(_SIG, "noise 0.5-10 Hz", hint_group="low", noise=True),
    "band_rms_10_70": MeasureInfo(_SIG, "noise 10-70 Hz", hint_group="mech", noise=True),
    "band_rms_70_1k": MeasureInfo(_SIG, "noise 70 Hz-1 kHz", hint_group="mid", noise=True),
    "band_rms_1k_corner": MeasureInfo(_SIG, "noise 1 kHz to corner", hint_group="high",
                                      noise=True, show=("report", "plot")),
    "spectral_lines": MeasureInfo(_SIG, "narrow spectral lines"),
    "corner_hz": MeasureInfo("Hz", "corner of the noise spectrum"),
    "oversampling": MeasureInfo("", "sample rate over corner"),
    "alias_risk": MeasureInfo("", "aliasing risk"),
    "holding": MeasureInfo(_SIG, "holding level", show=("report", "plot", "compare")),
    "baseline_drift": MeasureInfo("signal/s", "baseline drift", hint_group="low", noise=True,
                                  show=("report",)),
    "seal_resistance": MeasureInfo("Ohm", "seal resistance", display_unit="GOhm",
                                   show=("report", "plot", "compare"), log_axis=True),
    "access_resistance": MeasureInfo("Ohm", "access resistance",
                                     show=("report", "plot", "compare")),
    "membrane_resistance": MeasureInfo("Ohm", "membrane resistance",
                                       show=("report", "plot", "compare"), log_axis=True),
    "membrane_capacitance": MeasureInfo("F", "membrane capacitance",
                                        show=("report", "plot", "compare")),
    "tau": MeasureInfo("s", "test-pulse time constant", display_unit="us"),
    "access_change_pct": MeasureInfo("%", "access change, first to last sweeps"),
    "access_change_pct_se": MeasureInfo("%", "standard error of the access change"),
    "input_resistance": MeasureInfo("Ohm", "input resistance"),
    "clipping_fraction": MeasureInfo("", "clipped samples", show=("report",)),
}


def display_unit(measure: str, dimension: str) -> str:
    """The unit a measure is shown in, given its SI dimension ('A', 'V', 'Ohm', ...)."""
    info = MEASURES.get(measure)
    return info.display_unit if info is not None and info.display_unit else \
        units.DISPLAY[dimension]


def shown(view: str) -> tuple[str, ...]:
    """Measure names shown in ``view`` ('report', 'plot', 'compare'), in registry order."""
    return tuple(name for name, m in MEASURES.items() if view in m.show)


def file_time(recorded_at: datetime | float | None, mtime: float | None = None,
              default: float | None = None) -> float | None:
    """Unix seconds of a recording: its header time (naive = UTC, as headers give it, or
    already Unix seconds), else its mtime, else ``default``."""
    if isinstance(recorded_at, datetime):
        if recorded_at.tzinfo is None:
            recorded_at = recorded_at.replace(tzinfo=timezone.utc)
        return recorded_at.timestamp()
    if recorded_at is not None:
        return float(recorded_at)
    if mtime is not None:
        return float(mtime)
    return default


# ------------------------------------------------------------------------- a measured file

@dataclass(frozen=True)
class Measure:
    """One number with its display unit (``display_unit``); bools and counts have ''."""
    name: str
    value: float | int | bool
    unit: str


@dataclass(frozen=True)
class Spectrum:
    """Compact PSD of a channel's baseline: ~200 log-spaced points, density in unit**2/Hz.

    ``unit`` is the channel's display unit (pA or mV), so density is pA**2/Hz or mV**2/Hz.
    """
    freqs_hz: tuple[float, ...]
    density: tuple[float, ...]
    unit: str


@dataclass(frozen=True)
class ChannelMeasures:
    """One channel's measures, notes and spectrum."""
    # (a docstring of its own: without one, dataclass builds one from inspect.signature at
    # import, a cost of every start)
    index: int                       # input channel index in the file (0-based)
    name: str
    unit: str                        # the channel's own unit string, cleaned ('pA', '?')
    dimension: str                   # 'A', 'V' or '' (qcd.units.channel_quantity)
    measures: dict[str, Measure]     # by measure name; a measure that cannot be computed is absent
    notes: tuple[str, ...] = ()      # why a measure is absent, fallbacks taken
    spectrum: Spectrum | None = None


@dataclass(frozen=True)
class FileMeasures:
    """One file's outcome: its facts, channels and notes, or the error that stopped it."""
    path: str
    status: str                      # 'ok' | 'error'
    error: str | None = None         # one sentence naming the file and the reason
    error_kind: str | None = None    # qcd.errors.RECORDING_ERROR_KINDS
    mode: str = "unknown"            # MODES
    format: str = ""                 # 'ABF1' | 'ABF2'
    fs_hz: float | None = None
    duration_s: float | None = None
    n_sweeps: int | None = None
    gap_free: bool | None = None
    recorded_at: datetime | None = None   # from the header (UTC-naive as the file gives it)
    size: int | None = None
    mtime: float | None = None
    sha256: str | None = None
    channels: tuple[ChannelMeasures, ...] = ()
    notes: tuple[str, ...] = ()      # file-level oddities and fallbacks
    extra: dict[str, Any] = field(default_factory=dict)   # per-sweep series etc., JSON-able

    def to_json(self) -> dict[str, Any]:
        """The ``qcd scan --json`` object (one per file, one per line).

        ``{"path", "status", "error", "error_kind", "mode", "format", "fs_hz", "duration_s",
        "n_sweeps", "gap_free", "recorded_at", "notes", "channels": [{"index", "name", "unit",
        "measures": {NAME: {"value", "unit"}}, "notes"}]}``. ``spectral_lines`` has as value a
        list of ``{"freq_hz", "rms"}`` objects (rms in the measure's unit), loudest first.
        """
        chans = []
        for c in self.channels:
            ms: dict[str, Any] = {}
            for name, m in c.measures.items():
                if name == "spectral_lines":
                    value: Any = [{"freq_hz": _num(f), "rms": _num(r)} for f, r in m.value]
                else:
                    value = _num(m.value)
                ms[name] = {"value": value, "unit": m.unit}
            chans.append({"index": c.index, "name": c.name, "unit": c.unit,
                          "dimension": c.dimension, "measures": ms, "notes": list(c.notes)})
        return {
            "path": self.path, "status": self.status, "error": self.error,
            "error_kind": self.error_kind, "mode": self.mode, "format": self.format,
            "fs_hz": self.fs_hz, "duration_s": self.duration_s, "n_sweeps": self.n_sweeps,
            "gap_free": self.gap_free,
            "recorded_at": self.recorded_at.isoformat() if self.recorded_at else None,
            "notes": list(self.notes), "channels": chans,
        }


def _num(v: Any) -> Any:
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    v = float(v)
    return v if math.isfinite(v) else None
