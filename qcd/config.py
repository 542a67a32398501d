"""qcd.toml and rules/*.toml -> frozen dataclasses. The only TOML reader in qcd.

Imports only qcd.errors and qcd.units.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["TestPulse", "RigConfig", "Config", "load_config", "parse_pulse"]


@dataclass(frozen=True)
class TestPulse:
    """A declared test step: ``--pulse=AMP,START_MS,LENGTH_MS`` or a rig's ``test_pulse``.

    ``amplitude`` is the number as given: mV for a voltage-clamp file, pA for current clamp
    (the mode is known only once the file is read). ``start_s`` is from the start of each sweep.
    """
    amplitude: float
    start_s: float
    length_s: float

    def amplitude_si(self, mode: str) -> float:
        """Volts for ``voltage_clamp``, amperes for ``current_clamp``."""
        return self.amplitude * (1e-3 if mode == "voltage_clamp" else 1e-12)


@dataclass(frozen=True)
class RigConfig:
    name: str
    folders: tuple[Path, ...]
    patterns: tuple[str, ...] = ("*.abf",)
    polling: bool = False
    test_pulse: TestPulse | None = None
    mains_hz: float | None = None        # 50 or 60 when the lab knows it; else found from data


@dataclass(frozen=True)
class Config:
    path: Path | None                    # the qcd.toml it came from (None: built in)
    database: Path
    rules: tuple[Path, ...]
    notify: tuple[str, ...] = ()         # apprise URLs (secrets: never print, use redact())
    notify_config: Path | None = None    # an apprise config file
    settle_seconds: float = 5.0
    give_up_hours: float = 6.0
    rigs: tuple[RigConfig, ...] = field(default_factory=tuple)


def parse_pulse(text: str) -> TestPulse:
    """'AMP,START_MS,LENGTH_MS' -> TestPulse (AMP in mV for voltage clamp, pA for current clamp)."""
    from qcd.errors import ConfigError
    parts = [p.strip() for p in str(text).split(",")]
    if len(parts) != 3:
        raise ConfigError(None, "pulse", f"expected AMP,START_MS,LENGTH_MS, got {text!r}")
    try:
        amp, start_ms, length_ms = (float(p) for p in parts)
    except ValueError:
        raise ConfigError(None, "pulse", f"expected three numbers AMP,START_MS,LENGTH_MS, got {text!r}") from None
    if length_ms <= 0 or start_ms < 0 or amp == 0:
        raise ConfigError(None, "pulse", f"need AMP != 0, START_MS >= 0 and LENGTH_MS > 0, got {text!r}")
    return TestPulse(amp, start_ms * 1e-3, length_ms * 1e-3)


def load_config(path: Path) -> Config:
    """Read and validate qcd.toml (implemented with the store/judge work)."""
    raise NotImplementedError("load_config")
