"""The docs follow the code: every command has --help and a README section, and every measure
name of the registry (the names analysis can produce) is in the README's measures table
(sqlite-utils' docs test idea)."""
from __future__ import annotations

import re
from pathlib import Path

import pytest

from qcd.cli import build_parser

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _commands() -> list[str]:
    parser = build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    return sorted(sub.choices)


def _measure_names() -> set[str]:
    """Names qcd can store: the registry (qcd.results.MEASURES), checked against what analyze
    actually produces on the committed demo sample."""
    from qcd.analyze import analyze_path
    from qcd.results import MEASURES
    produced = set()
    for path in sorted((ROOT / "demo_data").rglob("*.abf")):
        fm = analyze_path(path)
        for ch in fm.channels:
            produced |= set(ch.measures)
    unregistered = sorted(produced - set(MEASURES))
    assert not unregistered, f"analyze produces names missing from the registry: {unregistered}"
    return set(MEASURES)


def _measures_table() -> set[str]:
    start = README.index("## Measures")
    section = README[start:README.index("\n## ", start + 5)]
    return set(re.findall(r"^\| `(\w+)`", section, flags=re.M))


@pytest.mark.parametrize("command", _commands())
def test_every_command_has_help_and_is_in_the_readme(command, capsys):
    with pytest.raises(SystemExit) as e:
        build_parser().parse_args([command, "--help"])
    assert e.value.code == 0
    out = capsys.readouterr().out
    assert "Example:" in out
    assert f"qcd {command}" in README, f"README does not mention 'qcd {command}'"


def test_every_measure_is_in_the_readme_measures_table():
    produced = _measure_names()
    assert {"noise_rms", "hum_rms", "seal_resistance", "access_resistance"} <= produced
    missing = sorted(produced - _measures_table())
    assert not missing, f"measures missing from the README table: {missing}"


def test_readme_keeps_the_two_commands_byte_for_byte():
    assert ("python3 -m venv .venv && .venv/bin/pip install -q -e . && .venv/bin/qcd demo"
            in README)
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    test_cmd = ("python3 -m venv .venv && .venv/bin/pip install -q -e '.[test]' && "
                ".venv/bin/python -m pytest -q")
    assert test_cmd in README and test_cmd in ci


def test_readme_carries_the_electrical_safety_caution():
    assert "licensed electrician" in README and "never open mains-powered equipment" in README


def test_readme_config_example_loads(tmp_path):
    from qcd.config import load_config
    block = README.split("```toml\n", 1)[1].split("```", 1)[0]
    path = tmp_path / "qcd.toml"
    path.write_text(block, encoding="utf-8")
    cfg = load_config(path)
    assert [r.name for r in cfg.rigs] == ["patch-1"]
    assert cfg.rigs[0].test_pulse is not None and cfg.rigs[0].mains_hz == 50


def test_the_registry_describes_the_units_analyze_gives():
    # every produced measure carries the unit its registry entry says (qcd.results.MEASURES):
    # the channel's display unit for 'signal', per minute for 'signal/s', '' for plain numbers
    from qcd.analyze import analyze_path
    from qcd.results import HINTS, MEASURES, display_unit
    from qcd.units import DISPLAY, FACTORS
    for name, m in MEASURES.items():
        assert m.hint_group is None or m.hint_group in HINTS, name
        assert not m.display_unit or m.display_unit in FACTORS, name
    from conftest import abf
    # (vc_tight_seal_noisy.abf reads as a small whole cell; vc_units_A_no_protocol.abf gives a seal)
    real = [abf(n) for n in ("vc_step_abf1.abf", "vc_tight_seal_noisy.abf", "cc_steps_abf1.abf",
                             "vc_units_A_no_protocol.abf")]
    seen = set()
    for path in sorted((ROOT / "demo_data").rglob("*.abf")) + real:
        for ch in analyze_path(path).channels:
            for name, got in ch.measures.items():
                dim = MEASURES[name].dimension
                if dim == "signal":
                    want = DISPLAY[ch.dimension]
                elif dim == "signal/s":
                    want = DISPLAY[ch.dimension + "/s"]
                else:
                    want = display_unit(name, dim)
                assert got.unit == want, (path.name, name, got.unit, want)
                seen.add(name)
    assert {"noise_rms", "baseline_drift", "hum_rms", "access_resistance", "tau",
            "seal_resistance", "input_resistance"} <= seen, sorted(seen)


def test_the_old_lifecycle_names_are_gone_from_code_and_docs():
    # the mute command and the lifecycle keys have names of their own; only the schema steps
    # (qcd/schema.py; history: they rename the old table) and the rule loader's table of
    # renamed keys, which refuses them by name, may still say the old ones
    old = re.compile(r"silenc|\bfor_files\b|\bclear_files\b|\brepeat_h(ours)?\b", re.I)
    files = [*sorted((ROOT / "qcd").rglob("*.py")), *sorted((ROOT / "rules").glob("*.toml")),
             ROOT / "README.md", ROOT / "DEVELOPERS.md", *sorted((ROOT / "deploy").iterdir())]
    for path in files:
        text = path.read_text(encoding="utf-8", errors="replace")
        if path.name == "schema.py":
            continue
        if path.name == "ruleset.py":
            text = re.sub(r"_RENAMED = \{[^}]*\}", "", text)
        if path.name == "README.md":
            text = re.sub(r"\(Rule files written\s+for earlier versions[^)]*\)", "", text)
        hits = [text[max(0, m.start() - 40):m.end() + 40] for m in old.finditer(text)]
        assert not hits, f"{path.name}: {hits}"
