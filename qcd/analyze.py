"""Recording -> FileMeasures: baseline windows, test-step source, one pass over the data, notes.

The dataclasses here are what every later stage (store, judge, report, scan --json) consumes.
Imports qcd.recording, qcd.measures, qcd.units, qcd.config (TestPulse), qcd.errors.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

__all__ = ["MODES", "Measure", "Spectrum", "ChannelMeasures", "FileMeasures", "analyze",
           "analyze_path"]

# Recording modes, stored as files.mode and used by rules as [mode] tables.
MODES = ("voltage_clamp", "current_clamp", "extracellular", "unknown")


@dataclass(frozen=True)
class Measure:
    """One number with its display unit (qcd.units.display_unit); bools and counts have ''."""
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
    index: int                       # input channel index in the file (0-based)
    name: str
    unit: str                        # the channel's own unit string, cleaned ('pA', '?')
    dimension: str                   # 'A', 'V' or '' (qcd.units.channel_quantity)
    measures: dict[str, Measure]     # by measure name; a measure that cannot be computed is absent
    notes: tuple[str, ...] = ()      # why a measure is absent, fallbacks taken
    spectrum: Spectrum | None = None


@dataclass(frozen=True)
class FileMeasures:
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
        """The ``qcd scan --json`` object (one per file, one per line)."""
        raise NotImplementedError


def analyze(recording: Any, *, pulse: Any = None, mains_hz: float | None = None) -> FileMeasures:
    """Measure an open Recording (one pass over its samples)."""
    raise NotImplementedError


def analyze_path(path: Any, *, pulse: Any = None, mains_hz: float | None = None) -> FileMeasures:
    """Open, measure and close one file. Never raises for a bad file: status 'error' instead."""
    raise NotImplementedError
