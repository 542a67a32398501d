"""Rule files (rules/*.toml, the package qcd.rules) -> frozen Rules: limits, history, settings.

Format (see rules/default.toml): a [settings] table, [[limit]] tables (fixed limits per mode)
and [[history]] tables (a rig against its own history). Later files override earlier rules of
the same name; ``enabled = false`` drops one. qcd.judge reads these dataclasses and never TOML.
Every rule is checked at load: a known measure (qcd.results.MEASURES), known modes, limits in
a unit of the measure's quantity; a wrong rule is a ConfigError, never a rule skipped later.
A chart rule's ``arl0_files`` (its in-control run length) sets its L or h through
qcd.runlength. Imports qcd.config (the TOML reader, the packaged rules path), qcd.results
(measure names and modes), qcd.runlength, qcd.units and qcd.errors.
"""
from __future__ import annotations

import difflib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from qcd.config import default_rules_path, read_toml
from qcd.errors import ConfigError
from qcd.results import MEASURES, MODES
from qcd.runlength import cusum_h_for, ewma_L_for
from qcd.units import parse_quantity

__all__ = ["RuleSettings", "LimitRule", "HistoryRule", "Rules", "load_rules", "rule_names",
           "INTAKE_RULE"]

# The rig-level rule every file is judged by (a file that cannot be measured), besides the files'.
INTAKE_RULE = "intake_error"


@dataclass(frozen=True)
class RuleSettings:
    """Shared defaults: history window, learning phase, alert lifecycle."""
    history_files: int = 30          # baseline: last N good files ...
    history_days: float = 30.0       # ... within D days
    learning_files: int = 10         # a rig/mode/channel/measure learns for its first N files
    open_after_files: int = 2        # consecutive bad files to open (limits default to 1)
    resolve_after_files: int = 3     # good files beyond the clear level to resolve
    remind_h: float = 24.0           # reminders at most this often, only while bad files arrive
    flap_changes: int = 6            # >= this many open/resolve changes ...
    flap_window: int = 21            # ... in the last N files: one "unstable" message
    intake_open_after_files: int = 1   # error files: open at once
    reference_files: int = 60        # the drift charts' reference: at least N good files ...
    reference_days: float = 20.0     # ... over at least D days (qcd.history)
    reference_margin: float = 1.5    # its limits widened 1 + margin/sqrt(days) (estimation)
    follow_days: float = 0.0         # > 0: the reference follows the rig from files older ...
    follow_files: int = 20           # ... than this many days and files (0: fixed reference)
    provisional_arl0_files: float = 1000.0   # a step chart on a provisional reference


@dataclass(frozen=True)
class LimitRule:
    """A fixed limit: bad when value < below, value > above, or bool(value) == equals.

    ``above``/``below`` are SI floats (``dimension`` says which quantity, '' for plain numbers).
    ``scope`` 'measure' gives one finding per channel; 'file' one per file naming the channels
    that broke it (acquisition settings: aliasing, sampling); 'rig' the same as a rig-level
    finding, which mutes that rig's measure alerts while it lasts (clipping).
    """
    name: str
    measure: str
    modes: tuple[str, ...] = ("*",)
    above: float | None = None
    below: float | None = None
    equals: bool | None = None
    dimension: str = ""
    absolute: bool = False
    scope: str = "measure"
    severity: str = "critical"
    open_after_files: int = 1
    resolve_after_files: int = 3
    remind_h: float = 24.0
    clear_margin: float = 0.1        # clears only beyond limit -/+ margin*|limit|
    text: str = ""                   # the limit as written: 'below 1 GOhm'


@dataclass(frozen=True)
class HistoryRule:
    """The rig against its own history: robust z ('z'), EWMA ('ewma') or CUSUM ('cusum')."""
    name: str
    measure: str
    modes: tuple[str, ...] = ("*",)
    test: str = "z"
    side: str = "both"               # 'up', 'down' or 'both': which direction is bad
    log: bool = False                # standardise log(value) (positive, skewed measures)
    z: float = 4.0                   # 'z': flag |z| > z
    clear_z: float = 3.0             # 'z': clears only below this
    lam: float = 0.2                 # 'ewma': lambda
    L: float = 3.0                   # 'ewma': limit width in sigma
    k: float = 0.5                   # 'cusum': reference value (sigma units)
    h: float = 5.0                   # 'cusum': decision interval (sigma units)
    arl0_files: float | None = None  # 'ewma'/'cusum': in-control run length L or h was set for
    step: bool = False               # 'cusum': a step chart (qcd.judge: opens on its own, also
                                     # on a young rig's provisional reference; jump rules stand
                                     # down while it has a learned reference)
    min_spread: float = 0.05         # floor of the robust scale (log units, or fraction of median)
    min_spread_abs: float | None = None   # or an absolute floor in SI ('min_spread = "12 pA"')
    spread_dimension: str = ""
    severity: str = "warning"
    open_after_files: int = 2
    resolve_after_files: int = 3
    remind_h: float = 24.0


@dataclass(frozen=True)
class Rules:
    limits: tuple[LimitRule, ...] = ()
    history: tuple[HistoryRule, ...] = ()
    settings: RuleSettings = RuleSettings()
    sources: tuple[Path, ...] = ()


_SEVERITIES = ("critical", "warning", "info")
_SETTINGS_KEYS = {"history_files": ("history_files", int), "history_days": ("history_days", float),
                  "learning_files": ("learning_files", int),
                  "open_after_files": ("open_after_files", int),
                  "resolve_after_files": ("resolve_after_files", int),
                  "remind_hours": ("remind_h", float),
                  "flap_changes": ("flap_changes", int), "flap_window": ("flap_window", int),
                  "intake_open_after_files": ("intake_open_after_files", int),
                  "reference_files": ("reference_files", int),
                  "reference_days": ("reference_days", float),
                  "reference_margin": ("reference_margin", float),
                  "follow_days": ("follow_days", float), "follow_files": ("follow_files", int),
                  "provisional_arl0_files": ("provisional_arl0_files", float)}
_MAY_BE_ZERO = {"follow_days", "follow_files", "reference_margin"}
_LIMIT_KEYS = {"name", "measure", "modes", "above", "below", "equals", "absolute", "scope",
               "severity", "open_after_files", "resolve_after_files", "remind_hours",
               "clear_margin", "enabled"}
_HISTORY_KEYS = {"name", "measure", "modes", "test", "side", "log", "z", "clear_z", "lambda", "L",
                 "k", "h", "arl0_files", "step", "min_spread", "severity", "open_after_files", "resolve_after_files",
                 "remind_hours", "enabled"}
# Keys of earlier rule files and the names they have now: a clear error, never a silent default.
_RENAMED = {"for_files": "open_after_files", "clear_files": "resolve_after_files",
            "repeat_hours": "remind_hours", "intake_for_files": "intake_open_after_files"}


def _unknown_key(path: Path, where: str, key: str, known: Any) -> ConfigError:
    """The error for a key a rule table does not take: the new name of a renamed one, else
    the closest known key."""
    if key in _RENAMED:
        return ConfigError(path, f"{where}.{key}", f"renamed: write {_RENAMED[key]!r} instead "
                                                   f"of {key!r}")
    hint = difflib.get_close_matches(key, sorted(known), n=1)
    return ConfigError(path, f"{where}.{key}", "unknown key"
                       + (f" (did you mean {hint[0]!r}?)" if hint else ""))


def _rule_number(path: Path, where: str, key: str, value: object, kind: type,
                 strict: bool = True) -> Any:
    """A positive number (``strict``) or a non-negative one, else ConfigError."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or \
            (kind is int and not isinstance(value, int)):
        raise ConfigError(path, f"{where}.{key}",
                          f"expected {'a whole number' if kind is int else 'a number'}, got {value!r}")
    if (strict and value <= 0) or value < 0:
        raise ConfigError(path, f"{where}.{key}",
                          f"must be {'greater than' if strict else 'at least'} 0, got {value!r}")
    return kind(value)


def _rule_quantity(path: Path, where: str, key: str, value: object) -> tuple[float, str]:
    if isinstance(value, bool):
        raise ConfigError(path, f"{where}.{key}", f"expected a value such as '25 MOhm', got {value!r}")
    if isinstance(value, (int, float)):
        return float(value), ""
    try:
        return parse_quantity(str(value))
    except ValueError as e:
        raise ConfigError(path, f"{where}.{key}", str(e)) from None


def _rule_modes(path: Path, where: str, value: object) -> tuple[str, ...]:
    items = [value] if isinstance(value, str) else value
    if not isinstance(items, list) or not items or not all(isinstance(m, str) for m in items):
        raise ConfigError(path, f"{where}.modes", f"expected a mode name or a list of them, got {value!r}")
    for m in items:
        if m != "*" and m not in MODES:
            hint = difflib.get_close_matches(m, MODES, n=1)
            raise ConfigError(path, f"{where}.modes", f"unknown mode {m!r}"
                              + (f" (did you mean {hint[0]!r}?)" if hint else "")
                              + f"; expected '*' or one of {', '.join(MODES)}")
    return tuple(items)


def _rule_measure(path: Path, where: str, name: str) -> None:
    if name not in MEASURES:
        hint = difflib.get_close_matches(name, list(MEASURES), n=1)
        raise ConfigError(path, f"{where}.measure", f"unknown measure {name!r}"
                          + (f" (did you mean {hint[0]!r}?)" if hint else "")
                          + "; the measures are listed in the README")


# The quantity a signal measure is in, per mode (voltage clamp measures current).
_SIGNAL_DIMS = {"voltage_clamp": ("A",), "current_clamp": ("V",), "extracellular": ("V",),
                "unknown": ("A", "V"), "*": ("A", "V")}
_EXAMPLE = {"A": "200 pA", "V": "20 uV", "Ohm": "25 MOhm", "F": "30 pF", "s": "100 us",
            "Hz": "1 kHz", "%": "20 %", "A/s": "5 pA/min", "V/s": "1 mV/min"}


def _check_dimension(path: Path, where: str, key: str, written: object, dim: str,
                     measure: str, modes: tuple[str, ...]) -> None:
    """ConfigError when a value written with a unit is not in the measure's quantity.

    A bare number (dimension '') is compared with the measure as stored, so it always fits.
    """
    if not dim:
        return
    info = MEASURES[measure].dimension
    if info in ("signal", "signal/s"):
        allowed = sorted({d + ("/s" if info == "signal/s" else "")
                          for m in modes for d in _SIGNAL_DIMS.get(m, ("A", "V"))})
    elif info == "":
        allowed = []
    else:
        allowed = [info]
    if dim in allowed:
        return
    if allowed:
        want = " or ".join(f"{d} (e.g. '{_EXAMPLE.get(d, d)}')" for d in allowed)
        raise ConfigError(path, f"{where}.{key}", f"{written!r} is a quantity in {dim}, but "
                          f"{measure} is in {want}")
    raise ConfigError(path, f"{where}.{key}", f"{written!r} has a unit, but {measure} is a plain "
                      f"number: write it without a unit")


def _rule_common(path: Path, where: str, t: dict, known: set[str], settings: RuleSettings,
                 default_for: int) -> dict[str, Any]:
    unknown = sorted(set(t) - known)
    if unknown:
        raise _unknown_key(path, where, unknown[0], known)
    for key in ("name", "measure"):
        if not isinstance(t.get(key), str) or not t[key]:
            raise ConfigError(path, f"{where}.{key}", "required, a non-empty string")
    _rule_measure(path, where, t["measure"])
    sev = t.get("severity", None)
    if sev is not None and sev not in _SEVERITIES:
        raise ConfigError(path, f"{where}.severity", f"expected one of {', '.join(_SEVERITIES)}, got {sev!r}")
    out: dict[str, Any] = {"name": t["name"], "measure": t["measure"],
                           "modes": _rule_modes(path, where, t.get("modes", "*")),
                           "open_after_files": _rule_number(
                               path, where, "open_after_files",
                               t.get("open_after_files", default_for), int),
                           "resolve_after_files": _rule_number(
                               path, where, "resolve_after_files",
                               t.get("resolve_after_files", settings.resolve_after_files), int),
                           "remind_h": _rule_number(path, where, "remind_hours",
                                                    t.get("remind_hours", settings.remind_h),
                                                    float)}
    if sev is not None:
        out["severity"] = sev
    return out


def _limit_rule(path: Path, where: str, t: dict, settings: RuleSettings) -> LimitRule:
    kw = _rule_common(path, where, t, _LIMIT_KEYS, settings, 1)
    dims, text = set(), []
    for key in ("above", "below"):
        if key in t:
            v, dim = _rule_quantity(path, where, key, t[key])
            _check_dimension(path, where, key, t[key], dim, kw["measure"], kw["modes"])
            kw[key] = v
            dims.add(dim)
            text.append(f"{key} {t[key]}")
    if "equals" in t:
        if not isinstance(t["equals"], bool):
            raise ConfigError(path, f"{where}.equals", f"expected true or false, got {t['equals']!r}")
        kw["equals"] = t["equals"]
        text.append(f"is {str(t['equals']).lower()}")
    if not text:
        raise ConfigError(path, where, "a limit needs 'above', 'below' or 'equals'")
    if len(dims) > 1:
        raise ConfigError(path, where, f"'above' and 'below' are different quantities ({sorted(dims)})")
    kw["dimension"] = dims.pop() if dims else ""
    if "absolute" in t:
        if not isinstance(t["absolute"], bool):
            raise ConfigError(path, f"{where}.absolute", f"expected true or false, got {t['absolute']!r}")
        kw["absolute"] = t["absolute"]
    if t.get("scope", "measure") not in ("measure", "file", "rig"):
        raise ConfigError(path, f"{where}.scope",
                          f"expected 'measure', 'file' or 'rig', got {t['scope']!r}")
    kw["scope"] = t.get("scope", "measure")
    if "clear_margin" in t:
        kw["clear_margin"] = _rule_number(path, where, "clear_margin", t["clear_margin"], float, False)
    kw["text"] = ("|value| " if kw.get("absolute") else "") + " or ".join(text)
    return LimitRule(**kw)


def _history_rule(path: Path, where: str, t: dict, settings: RuleSettings) -> HistoryRule:
    kw = _rule_common(path, where, t, _HISTORY_KEYS, settings, settings.open_after_files)
    test = t.get("test", "z")
    if test not in ("z", "ewma", "cusum"):
        raise ConfigError(path, f"{where}.test", f"expected 'z', 'ewma' or 'cusum', got {test!r}")
    side = t.get("side", "both")
    if side not in ("up", "down", "both"):
        raise ConfigError(path, f"{where}.side", f"expected 'up', 'down' or 'both', got {side!r}")
    kw.update(test=test, side=side)
    if "log" in t:
        if not isinstance(t["log"], bool):
            raise ConfigError(path, f"{where}.log", f"expected true or false, got {t['log']!r}")
        kw["log"] = t["log"]
    if "step" in t:
        if not isinstance(t["step"], bool):
            raise ConfigError(path, f"{where}.step", f"expected true or false, got {t['step']!r}")
        if t["step"] and test != "cusum":
            raise ConfigError(path, f"{where}.step", "only a 'cusum' rule can be a step chart")
        kw["step"] = t["step"]
    if isinstance(t.get("min_spread"), str):
        kw["min_spread_abs"], kw["spread_dimension"] = _rule_quantity(path, where, "min_spread",
                                                                      t["min_spread"])
        if kw["min_spread_abs"] < 0:
            raise ConfigError(path, f"{where}.min_spread", "must not be negative")
        _check_dimension(path, where, "min_spread", t["min_spread"], kw["spread_dimension"],
                         kw["measure"], kw["modes"])
        t = {k: v for k, v in t.items() if k != "min_spread"}
    for key, attr in (("z", "z"), ("clear_z", "clear_z"), ("lambda", "lam"), ("L", "L"), ("k", "k"),
                      ("h", "h"), ("min_spread", "min_spread")):
        if key in t:
            kw[attr] = _rule_number(path, where, key, t[key], float, key != "min_spread")
    if "z" in t and "clear_z" not in t:
        kw["clear_z"] = 0.75 * kw["z"]
    if not 0 < kw.get("lam", 0.2) <= 1:
        raise ConfigError(path, f"{where}.lambda", f"must be in (0, 1], got {kw['lam']!r}")
    if "arl0_files" in t:
        if test == "z":
            raise ConfigError(path, f"{where}.arl0_files", "only an 'ewma' or 'cusum' rule has a "
                                                           "run length")
        given = "L" if test == "ewma" else "h"
        if given in t:
            raise ConfigError(path, f"{where}.{given}", f"give either arl0_files or {given}, "
                                                        f"not both ({given} follows from it)")
        arl0 = _rule_number(path, where, "arl0_files", t["arl0_files"], float)
        if arl0 < 2:
            raise ConfigError(path, f"{where}.arl0_files", f"must be at least 2, got {arl0!r}")
        kw["arl0_files"] = arl0
        one = side if side != "both" else "both"
        if test == "ewma":
            kw["L"] = ewma_L_for(arl0, kw.get("lam", 0.2), side=one)
        else:
            kw["h"] = cusum_h_for(arl0, kw.get("k", 0.5), side=one)
    if kw.get("clear_z", 3.0) > kw.get("z", 4.0):
        raise ConfigError(path, f"{where}.clear_z", "must not exceed z (the clear level lies short of the open level)")
    return HistoryRule(**kw)


def load_rules(paths: Any = ()) -> Rules:
    """Read rule files in order (later ones override rules of the same name) -> Rules.

    No paths: the packaged rules/default.toml. Every problem is a ConfigError naming the file,
    the table and the key.
    """
    paths = [Path(p) for p in (paths or ())] or [default_rules_path()]
    settings = RuleSettings()
    raw_settings: dict[str, Any] = {}
    tables: list[tuple[Path, str, str, dict]] = []
    for path in paths:
        data = read_toml(path)
        unknown = sorted(set(data) - {"settings", "limit", "history"})
        if unknown:
            raise ConfigError(path, unknown[0], "unknown table (expected [settings], [[limit]], [[history]])")
        s = data.get("settings", {})
        if not isinstance(s, dict):
            raise ConfigError(path, "settings", "expected a table")
        for key, value in s.items():
            if key not in _SETTINGS_KEYS:
                raise _unknown_key(path, "settings", key, _SETTINGS_KEYS)
            attr, kind = _SETTINGS_KEYS[key]
            raw_settings[attr] = _rule_number(path, "settings", key, value, kind,
                                              key not in _MAY_BE_ZERO)
        for kind in ("limit", "history"):
            items = data.get(kind, [])
            if not isinstance(items, list) or not all(isinstance(i, dict) for i in items):
                raise ConfigError(path, kind, f"expected [[{kind}]] tables")
            for i, t in enumerate(items):
                tables.append((path, kind, f"{kind}[{i}]", t))
    settings = RuleSettings(**raw_settings)
    by_name: dict[str, Any] = {}
    for path, kind, where, t in tables:
        name = t.get("name")
        where = f"{kind}[{name}]" if isinstance(name, str) and name else where
        if t.get("enabled", True) is False:
            by_name.pop(name, None)
            continue
        rule = _limit_rule(path, where, t, settings) if kind == "limit" else \
            _history_rule(path, where, t, settings)
        by_name.pop(rule.name, None)
        by_name[rule.name] = rule
    return Rules(limits=tuple(r for r in by_name.values() if isinstance(r, LimitRule)),
                 history=tuple(r for r in by_name.values() if isinstance(r, HistoryRule)),
                 settings=settings, sources=tuple(paths))


def rule_names(rules: Rules) -> list[str]:
    """Every rule name findings can carry (limits, history, the intake rule), sorted."""
    return sorted({r.name for r in rules.limits} | {r.name for r in rules.history}
                  | {INTAKE_RULE})
