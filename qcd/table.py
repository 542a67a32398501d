"""The ``qcd scan`` table: one row per measured file with the primary channel's key measures
in the units its header names, and an error row that says the whole reason. Pure formatting;
imports qcd.results only for types and on first use.
"""
from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from qcd.results import FileMeasures, Measure

__all__: list[str] = []

_SCAN_MODES = {"voltage_clamp": "VC", "current_clamp": "CC", "extracellular": "EXT",
               "unknown": "?"}
# (header over, header, width, measure): the scan table's number columns, values in the units
# the headers name ('unit' is the channel's own: pA in voltage clamp, mV otherwise)
_SCAN_COLUMNS = (("noise", "rms", 8, "noise_rms"), ("noise", "rms_1k", 8, "noise_rms_1k"),
                 ("mains", "hum", 8, "hum_rms"), ("mains", "Hz", 5, "line_hz"),
                 ("access", "MOhm", 7, "access_resistance"),
                 ("membrane", "MOhm", 8, "membrane_resistance"),
                 ("capacitance", "pF", 11, "membrane_capacitance"),
                 ("seal", "GOhm", 6, "seal_resistance"), ("input", "MOhm", 6, "input_resistance"))
_SCAN_NAME_MAX = 27          # the table then fits 120 columns


def _short_name(name: str, width: int) -> str:
    """``name`` cut from the middle to ``width`` characters, keeping more of its end (where
    names of one series differ: cell01_0003.abf)."""
    if len(name) <= width:
        return name
    tail = (2 * (width - 3) + 2) // 3
    return name[:width - 3 - tail] + "..." + name[len(name) - tail:]


def _scan_width(files: list[Path]) -> int:
    return max(8, min(_SCAN_NAME_MAX, max((len(f.name) for f in files), default=8)))


def _scan_header(width: int) -> str:
    top = " " * (width + 10)
    low = f"{'file':<{width}} {'mode':<4} {'unit':<4}"
    for over, head, w, _ in _SCAN_COLUMNS:
        top += f" {over if head != 'Hz' and (over, head) != ('noise', 'rms_1k') else '':>{w}}"
        low += f" {head:>{w}}"
    return f"{top.rstrip()}\n{low} status"


def _scan_number(m: Measure | None, width: int, digits: int = 3) -> str:
    if m is None or isinstance(m.value, bool) or not isinstance(m.value, (int, float)):
        return f"{'-':>{width}}"
    text = f"{m.value:.{digits}g}"
    if "e+" in text and abs(m.value) < 10 ** (width - 1):
        text = f"{m.value:.0f}"                        # 1542, not 1.54e+03
    return f"{text:>{width}}"


def _scan_row(fm: FileMeasures, width: int, mains_hz: float | None = None) -> str:
    """One row of the scan table; an error row says the whole reason."""
    name = _short_name(Path(fm.path).name, width)
    if fm.status != "ok":
        err = (fm.error or "").replace(str(fm.path) + ": ", "")
        return f"{name:<{width}} {'':4} {'':4} error ({fm.error_kind}): {err}"
    prim = fm.extra.get("primary_channel")
    chans = {c.index: c for c in fm.channels}
    ch = chans.get(prim) or (fm.channels[0] if fm.channels else None)
    ms = dict(ch.measures) if ch else {}
    unit = next((ms[k].unit for k in ("noise_rms", "holding", "hum_rms") if k in ms),
                ch.unit if ch else "")                # the unit the values are given in
    if "line_hz" not in ms and mains_hz and "hum_rms" in ms:
        from qcd.results import Measure as _M
        ms["line_hz"] = _M("line_hz", mains_hz, "Hz")          # the declared frequency
    cells = []
    for _, _, w, measure in _SCAN_COLUMNS:
        if measure == "hum_rms" and "hum_rms" not in ms and "hum_rms_max" in ms:
            cells.append(f"{'<' + _scan_number(ms['hum_rms_max'], w - 1).strip():>{w}}")
        else:
            cells.append(_scan_number(ms.get(measure), w, 4 if measure == "line_hz" else 3))
    return (f"{name:<{width}} {_SCAN_MODES.get(fm.mode, '?'):<4} {unit[:4]:<4} "
            + " ".join(cells) + " ok")
