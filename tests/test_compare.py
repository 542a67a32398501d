"""qcd compare against analytic signals: sines of known amplitude in white noise, written as
real ABF1 files (pyabf's writer) and read back through qcd's reader."""
from __future__ import annotations

import json
import math
import time
from pathlib import Path

import numpy as np
import pytest

from qcd.compare import compare_paths, render_compare_html, render_compare_text
from qcd.synth import write_abf1

FS = 10_000.0


def _write(path: Path, hum_60: float, *, seconds: float = 6.0, noise: float = 0.5,
           seed: int = 1, extra: float = 0.3) -> Path:
    n = int(seconds * FS)
    t = np.arange(n) / FS
    rng = np.random.default_rng(seed)
    y = (hum_60 * np.sin(2 * np.pi * 60 * t) + extra * np.sin(2 * np.pi * 180 * t + 0.4)
         + rng.normal(0.0, noise, n))
    write_abf1(path, y[None, :], FS, "pA", time.time() - 3600, gap_free=True)
    return path


def test_twelve_db_less_hum_at_60_hz_is_reported_to_half_a_db(tmp_path):
    # Analytic: a sine of peak amplitude A has RMS A/sqrt(2); scaling A by 10**(-12/20) lowers
    # its power by exactly 12 dB (definition of the decibel).
    a = 2.0
    before = _write(tmp_path / "before.abf", a, seed=1)
    after = _write(tmp_path / "after.abf", a * 10 ** (-12 / 20), seed=2)
    c = compare_paths(before, after, mains_hz=60.0)
    ch = {x.name: x for x in c.changes}
    h1 = ch["hum_h1"]
    assert h1.change_db == pytest.approx(-12.0, abs=0.5)
    assert h1.before == pytest.approx(a / math.sqrt(2), rel=0.03)
    assert h1.after == pytest.approx(a * 10 ** (-12 / 20) / math.sqrt(2), rel=0.03)
    assert h1.unit == "pA"
    assert h1.significant
    # the untouched 180 Hz line and the white-noise bands did not change
    assert abs(ch["hum_h3"].change_db) < 0.5 and not ch["hum_h3"].significant
    assert abs(ch["band_rms_1k_corner"].change_db) < 0.5
    assert not ch["band_rms_1k_corner"].significant
    assert "mains" in c.hint and c.safety_note and "electrician" in c.safety_note


def test_mains_frequency_is_found_from_the_data(tmp_path):
    before = _write(tmp_path / "b.abf", 2.0, seed=3)
    after = _write(tmp_path / "a.abf", 1.0, seed=4)
    c = compare_paths(before, after)
    assert c.before.line_hz == 60.0
    # 2x amplitude -> 20 log10(1/2) = -6.02 dB
    assert {x.name: x for x in c.changes}["hum_h1"].change_db == pytest.approx(-6.02, abs=0.5)


def test_broadband_noise_rise_is_significant_and_hinted(tmp_path):
    # white noise SD 0.5 -> 1.5 pA: every band's power rises by 20 log10(3) = 9.54 dB
    before = _write(tmp_path / "b.abf", 0.2, noise=0.5, seed=5)
    after = _write(tmp_path / "a.abf", 0.2, noise=1.5, seed=6)
    c = compare_paths(before, after, mains_hz=60.0)
    top = {x.name: x for x in c.changes}["band_rms_1k_corner"]
    assert top.change_db == pytest.approx(20 * math.log10(3), abs=0.5)
    assert top.significant
    assert "rose" in c.hint


def test_same_signal_twice_shows_no_significant_change(tmp_path):
    before = _write(tmp_path / "b.abf", 1.0, seed=7)
    after = _write(tmp_path / "a.abf", 1.0, seed=8)
    c = compare_paths(before, after, mains_hz=60.0)
    assert not [x for x in c.changes if x.significant]
    assert "no measurable" in c.hint


def test_folders_use_file_to_file_variation(tmp_path):
    for i in range(3):
        _write(tmp_path / "before" / f"b{i}.abf", 2.0, seed=10 + i, seconds=3)
        _write(tmp_path / "after" / f"a{i}.abf", 0.5, seed=20 + i, seconds=3)
    c = compare_paths(tmp_path / "before", tmp_path / "after", mains_hz=60.0)
    assert c.before.units_of_variation == "files" and c.before.n == 3
    assert {x.name: x for x in c.changes}["hum_h1"].change_db == \
        pytest.approx(20 * math.log10(0.25), abs=0.5)


@pytest.mark.slow
def test_outputs_json_text_and_self_contained_html(tmp_path):
    before = _write(tmp_path / "b.abf", 2.0, seed=1)
    after = _write(tmp_path / "a.abf", 0.5, seed=2)
    c = compare_paths(before, after, mains_hz=60.0)
    d = json.loads(json.dumps(c.to_json()))
    assert d["changes"][0]["unit"] == "pA"
    text = render_compare_text(c)
    assert max(len(line) for line in text.splitlines()) <= 100
    page = render_compare_html(c)
    assert "data:image/png;base64," in page
    assert "http://" not in page and "https://" not in page
    # the hum fell 12 dB: an improvement, shaded as one and not like an alarm
    assert "<tr class='better'>" in page
    assert page.count("<tr class='sig'>") == sum(x.significant and x.change_db > 0
                                                  for x in c.changes)


def test_cli_compare_json(tmp_path, capsys):
    from qcd.cli import main
    before = _write(tmp_path / "b.abf", 2.0, seed=1)
    after = _write(tmp_path / "a.abf", 0.5, seed=2)
    assert main(["compare", str(before), str(after), "--json", "--mains", "60"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert any(ch["name"] == "hum_h1" for ch in d["changes"])


def test_missing_file_is_a_clear_error(tmp_path, capsys):
    from qcd.cli import main
    assert main(["compare", str(tmp_path / "nope.abf"), str(tmp_path / "x.abf")]) == 2
    assert "no such file" in capsys.readouterr().err


def test_real_recording_against_itself_changes_nothing():
    # identity: the same real gap-free recording on both sides must give 0 dB everywhere
    from conftest import abf
    path = abf("gapfree_cc_slow_drift.abf")
    c = compare_paths(path, path)
    assert c.changes and all(x.change_db == 0.0 and not x.significant for x in c.changes)
    assert c.before.unit == "mV"


def test_real_episodic_file_compares_without_its_test_step():
    from conftest import abf
    path = abf("vc_model_cell_step.abf")
    c = compare_paths(path, path)
    # a -ve test step of tens of pA would dominate the bands if it were taken as baseline;
    # the model cell's pre-step baseline noise is a few pA at most
    assert all(x.before < 10.0 for x in c.changes if x.name.startswith("band_"))
