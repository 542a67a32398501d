"""Units: SI factors for the ASCII unit names qcd prints and stores, and the display table.

Code computes in SI; values leave qcd (JSON, store, report) in the display unit of their
quantity (per measure: qcd.results.display_unit). Imports nothing from qcd.
"""
from __future__ import annotations

import re

__all__ = ["FACTORS", "DIMENSION", "DISPLAY", "to_si", "from_si", "parse_quantity",
           "channel_quantity", "readable", "readable_unit", "pretty_unit"]

# ASCII unit -> factor to SI. Dimension names are SI base spellings.
FACTORS: dict[str, float] = {
    "A": 1.0, "mA": 1e-3, "uA": 1e-6, "nA": 1e-9, "pA": 1e-12, "fA": 1e-15,
    "V": 1.0, "mV": 1e-3, "uV": 1e-6,
    "Ohm": 1.0, "kOhm": 1e3, "MOhm": 1e6, "GOhm": 1e9,
    "F": 1.0, "nF": 1e-9, "pF": 1e-12,
    "s": 1.0, "ms": 1e-3, "us": 1e-6, "min": 60.0, "h": 3600.0,
    "Hz": 1.0, "kHz": 1e3,
    "pA/min": 1e-12 / 60.0, "nA/min": 1e-9 / 60.0, "mV/min": 1e-3 / 60.0,
    "uV/min": 1e-6 / 60.0, "V/min": 1.0 / 60.0,
    "%": 1.0, "": 1.0, "dB": 1.0,
}

DIMENSION: dict[str, str] = {}
for _u in ("A", "mA", "uA", "nA", "pA", "fA"):
    DIMENSION[_u] = "A"
for _u in ("V", "mV", "uV"):
    DIMENSION[_u] = "V"
for _u in ("Ohm", "kOhm", "MOhm", "GOhm"):
    DIMENSION[_u] = "Ohm"
for _u in ("F", "nF", "pF"):
    DIMENSION[_u] = "F"
for _u in ("s", "ms", "us", "min", "h"):
    DIMENSION[_u] = "s"
for _u in ("Hz", "kHz"):
    DIMENSION[_u] = "Hz"
for _u in ("pA/min", "nA/min"):
    DIMENSION[_u] = "A/s"
for _u in ("mV/min", "uV/min", "V/min"):
    DIMENSION[_u] = "V/s"
DIMENSION.update({"%": "%", "": "", "dB": "dB"})

# SI dimension -> the unit values are shown, stored and compared in (a measure may override
# it: qcd.results.MEASURES, e.g. seal resistance in GOhm).
DISPLAY: dict[str, str] = {
    "A": "pA", "V": "mV", "Ohm": "MOhm", "F": "pF", "s": "ms", "Hz": "Hz",
    "A/s": "pA/min", "V/s": "mV/min", "%": "%", "": "", "dB": "dB",
}

_SPELLINGS = {"ohm": "Ohm", "kohm": "kOhm", "mohm": "MOhm", "gohm": "GOhm",
              "\u03a9": "Ohm", "k\u03a9": "kOhm", "M\u03a9": "MOhm", "G\u03a9": "GOhm",
              "\u00b5s": "us", "\u00b5V": "uV", "\u00b5A": "uA", "\u03bcs": "us",
              "\u03bcV": "uV", "sec": "s", "percent": "%"}


def _canonical(unit: str) -> str:
    unit = unit.strip()
    if unit in FACTORS:
        return unit
    if unit in _SPELLINGS:
        return _SPELLINGS[unit]
    low = unit.lower()
    if low in _SPELLINGS:
        return _SPELLINGS[low]
    for known in FACTORS:
        if known.lower() == low and known.lower() not in ("mohm",):
            return known
    raise ValueError(f"unknown unit {unit!r}")


def to_si(value: float, unit: str) -> float:
    """``value`` given in ``unit`` -> SI."""
    return float(value) * FACTORS[_canonical(unit)]


def from_si(value: float, unit: str) -> float:
    """An SI value -> ``unit``."""
    return float(value) / FACTORS[_canonical(unit)]


_QUANTITY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(\S*)\s*$")


def parse_quantity(text: str) -> tuple[float, str]:
    """'1 GOhm' -> (1e9, 'Ohm'); '25 MOhm' -> (2.5e7, 'Ohm'); '20 %' -> (20.0, '%')."""
    m = _QUANTITY.match(str(text))
    if not m:
        raise ValueError(f"expected a number and a unit such as '25 MOhm', got {text!r}")
    unit = _canonical(m.group(2))
    return float(m.group(1)) * FACTORS[unit], DIMENSION[unit]


def channel_quantity(unit: str) -> tuple[str, float]:
    """A recording channel's unit string -> (dimension, factor to SI).

    Unknown units (``'?'``, ``'mmHg'``, ``'deg C'``) give ``('', 1.0)``: measured as plain numbers.
    """
    cleaned = unit.replace("\x00", "").strip()
    try:
        canon = _canonical(cleaned)
    except ValueError:
        return "", 1.0
    dim = DIMENSION[canon]
    if dim not in ("A", "V"):
        return "", 1.0
    return dim, FACTORS[canon]


# --- readable values for people -------------------------------------------------------------

# Per dimension, the units a reader may see, smallest first (all in FACTORS).
_LADDER = {"A": ("fA", "pA", "nA", "uA", "mA", "A"), "V": ("uV", "mV", "V"),
           "Ohm": ("Ohm", "kOhm", "MOhm", "GOhm"), "F": ("pF", "nF", "F"),
           "A/s": ("pA/min", "nA/min"), "V/s": ("uV/min", "mV/min", "V/min")}


def readable_unit(value: float | None, unit: str) -> tuple[str, float]:
    """(unit, factor): the unit of ``unit``'s dimension that puts ``value`` between 1 and 1000
    (``value * factor`` is in it); ``(unit, 1.0)`` when the dimension has no ladder."""
    import math
    try:
        canon = _canonical(unit)
    except ValueError:
        return unit, 1.0
    ladder = _LADDER.get(DIMENSION.get(canon, ""))
    if not ladder or value is None or isinstance(value, bool) or not math.isfinite(value) \
            or value == 0.0:
        return unit, 1.0
    si = float(value) * FACTORS[canon]
    pick = ladder[0]
    for u in ladder:
        if abs(si) / FACTORS[u] >= 1.0 - 1e-12:
            pick = u
    return pick, FACTORS[canon] / FACTORS[pick]


def pretty_unit(unit: str) -> str:
    """The symbols people read: 'uV' -> '\u00b5V', 'MOhm' -> 'M\u03a9' (ASCII stays in JSON)."""
    unit = unit.replace("Ohm", "\u03a9")
    return "\u00b5" + unit[1:] if unit.startswith("u") else unit


def readable(value: float | None, unit: str, *, pretty: bool = False, digits: int = 3) -> str:
    """A value with the unit that puts it between 1 and 1000 where its dimension has one:
    ``readable(0.00215, 'mV')`` -> '2.15 uV'; with ``pretty`` the symbols people read
    ('2.15 \u00b5V', '25 M\u03a9'). Times stay in their unit (us for tau, ms). '-' for None or
    not finite."""
    import math
    if value is None or isinstance(value, bool) or not math.isfinite(float(value)):
        return "-"
    unit, factor = readable_unit(float(value), unit)
    text = f"{float(value) * factor:.{digits}g}"
    return f"{text} {pretty_unit(unit) if pretty else unit}".strip()
