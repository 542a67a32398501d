"""judge: drift statistics against published worked examples, rules against fixed limits."""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import median_abs_deviation

from qcd.errors import ConfigError
from qcd.judge import baseline, cusum, ewma, ewma_limits, judge, robust_z
from qcd.results import SAFETY_NOTE, ChannelMeasures, FileMeasures, Measure
from qcd.ruleset import load_rules

# --- NIST/SEMATECH e-Handbook 6.3.2.4 "EWMA Control Charts", worked example -------------------
EWMA_X = [52.0, 47.0, 53.0, 49.3, 50.1, 47.0, 51.0, 50.1, 51.2, 50.5,
          49.6, 47.6, 49.9, 51.3, 47.8, 51.2, 52.6, 52.4, 53.6, 52.1]
EWMA_Z = [50.60, 49.52, 50.56, 50.18, 50.16, 49.21, 49.75, 49.85, 50.26, 50.33,
          50.11, 49.36, 49.52, 50.05, 49.38, 49.92, 50.73, 51.23, 51.94, 51.99]

# --- NIST/SEMATECH e-Handbook 6.3.2.3 "Cusum Control Charts", tabular example ----------------
CUSUM_X = [324.925, 324.675, 324.725, 324.350, 325.350, 325.225, 324.125, 324.525, 325.225,
           324.600, 324.625, 325.150, 328.325, 327.250, 327.825, 328.500, 326.675, 327.775,
           326.875, 328.350]
CUSUM_UP = [0.00, 0.00, 0.00, 0.00, 0.03, 0.00, 0.00, 0.00, 0.00, 0.00,
            0.00, 0.00, 3.01, 4.94, 7.45, 10.63, 11.99, 14.44, 16.00, 19.04]
CUSUM_DOWN = [0.00, 0.01, 0.00, 0.33, 0.00, 0.00, 0.56, 0.72, 0.17, 0.25,
              0.31, 0.00, 0.00, 0.00, 0.00, 0.00, 0.00, 0.00, 0.00, 0.00]


def test_ewma_reproduces_nist_worked_example():
    # NIST 6.3.2.4: EWMA_0 = 50, lambda = 0.3, s = 2.0539; values printed to 2 dp
    chart = ewma(EWMA_X, 0.3, target=50.0, sigma=2.0539, L=3.0)
    assert [round(z, 2) for z in chart.statistic] == EWMA_Z


def test_ewma_limits_match_nist_to_printed_precision():
    # NIST 6.3.2.4: UCL 52.5884, LCL 47.4115 (two roundings mixed on the page: +-2e-4)
    ucl, lcl = ewma_limits(50.0, 2.0539, 0.3, 3.0)
    assert ucl == pytest.approx(52.5884, abs=2e-4)
    assert lcl == pytest.approx(47.4115, abs=2e-4)


def test_ewma_exact_time_varying_limits_first_points():
    # exact limit multiplies by sqrt(1-(1-lambda)^(2t)); recomputed values 51.8485, 52.2564, 52.4314
    chart = ewma(EWMA_X, 0.3, target=50.0, sigma=2.0539, L=3.0)
    assert chart.upper[:3] == pytest.approx([51.8485, 52.2564, 52.4314], abs=1e-4)
    assert chart.upper[13] == pytest.approx(52.5884, abs=2e-4)   # from t = 14 on


def test_ewma_nist_example_never_signals():
    # NIST 6.3.2.4: every EWMA lies within the limits, exact or asymptotic
    assert not any(ewma(EWMA_X, 0.3, target=50.0, sigma=2.0539).signal)
    assert not any(ewma(EWMA_X, 0.3, target=50.0, sigma=2.0539, exact=False).signal)


def test_cusum_reproduces_nist_tabular_example():
    # NIST 6.3.2.3: target 325, k = 0.3175, h = 4.1959; S values to abs 0.01 (page rounds halves)
    chart = cusum(CUSUM_X, 325.0, 0.3175, 4.1959)
    assert chart.upper == pytest.approx(CUSUM_UP, abs=0.01)
    assert chart.lower == pytest.approx(CUSUM_DOWN, abs=0.01)


def test_cusum_first_signal_is_group_14_and_lower_never_signals():
    # NIST 6.3.2.3: groups 14-20 out of control, S- never signals
    chart = cusum(CUSUM_X, 325.0, 0.3175, 4.1959)
    assert [i + 1 for i, s in enumerate(chart.signal_up) if s] == list(range(14, 21))
    assert not any(chart.signal_down)


RA_HISTORY = [8.0, 9.0, 10.0, 9.5, 8.5, 11.0, 10.0, 10.5, 9.0, 9.5]


def test_robust_z_matches_methods_check_values():
    # docs/methods.md §7 check: median 9.5, MAD 0.5 (scaled 0.7413), new 18 MOhm -> z = 11.47
    med, scale = baseline(RA_HISTORY)
    assert med == 9.5
    assert scale == pytest.approx(0.7413, abs=1e-4)
    assert robust_z(18.0, RA_HISTORY) == pytest.approx(11.47, abs=0.005)


def test_robust_scale_equals_scipy_normal_mad():
    # scipy.stats.median_abs_deviation(scale='normal') as the reference library
    rng = np.random.default_rng(7)
    for _ in range(20):
        x = rng.lognormal(0.0, 0.5, size=int(rng.integers(5, 60)))
        assert baseline(x)[1] == pytest.approx(median_abs_deviation(x, scale="normal"), rel=1e-12)


def test_robust_z_scale_is_floored_when_values_tie():
    # over half the values equal: MAD 0; the floor keeps z finite (drift reference: floor MAD)
    assert math.isfinite(robust_z(2.0, [1.0] * 8 + [1.5], min_spread=0.1))
    assert robust_z(2.0, [1.0] * 8 + [1.5], min_spread=0.1) == pytest.approx(10.0)


# --- the judge on hand-built FileMeasures -------------------------------------------------------

def _fm(measures: dict[str, tuple[float, str]], mode: str = "voltage_clamp",
        path: str = "f.abf") -> FileMeasures:
    ch = ChannelMeasures(index=0, name="IN 0", unit="pA", dimension="A",
                         measures={k: Measure(k, v, u) for k, (v, u) in measures.items()})
    return FileMeasures(path=path, status="ok", mode=mode, channels=(ch,))


def _no_history(mode, channel, measure, *, clean_files=False):
    return []


def _by_rule(findings):
    return {f.rule: f for f in findings}


@pytest.fixture(scope="module")
def rules():
    return load_rules()


def test_seal_below_one_gigaohm_is_bad(rules):
    # gigaseal >= 1 GOhm (Hamill et al. 1981); seal stored in GOhm
    bad = _by_rule(judge(_fm({"seal_resistance": (0.6, "GOhm")}), "rig-a", _no_history, rules, 0))
    good = _by_rule(judge(_fm({"seal_resistance": (3.0, "GOhm")}), "rig-a", _no_history, rules, 0))
    assert bad["gigaseal"].bad and bad["gigaseal"].kind == "limit"
    assert not good["gigaseal"].bad and good["gigaseal"].clear
    assert bad["gigaseal"].open_after_files == 1 and "1 GOhm" in bad["gigaseal"].limit_text


def test_limits_compare_across_units(rules):
    # 25 MOhm limit against a value given in MOhm and in GOhm (units are converted, not assumed)
    f1 = _by_rule(judge(_fm({"access_resistance": (30.0, "MOhm")}), "r", _no_history, rules, 0))
    f2 = _by_rule(judge(_fm({"access_resistance": (0.02, "GOhm")}), "r", _no_history, rules, 0))
    assert f1["access_high"].bad and not f2["access_high"].bad


def test_limit_clear_level_lies_short_of_open_level(rules):
    # just under 25 MOhm is good but not yet beyond the clear level (10 % margin: 22.5 MOhm)
    f = _by_rule(judge(_fm({"access_resistance": (24.0, "MOhm")}), "r", _no_history, rules, 0))
    assert not f["access_high"].bad and not f["access_high"].clear
    f = _by_rule(judge(_fm({"access_resistance": (20.0, "MOhm")}), "r", _no_history, rules, 0))
    assert f["access_high"].clear


def test_access_change_and_holding_use_magnitude(rules):
    # access change > 20 % and |I_hold| > 200 pA (common practice), either sign
    f = _by_rule(judge(_fm({"access_change_pct": (-25.0, "%"), "holding": (-250.0, "pA")}),
                       "r", _no_history, rules, 0))
    assert f["access_change"].bad and f["holding_current"].bad


def test_limits_apply_only_to_their_mode(rules):
    f = _by_rule(judge(_fm({"seal_resistance": (0.2, "GOhm")}, mode="current_clamp"),
                       "r", _no_history, rules, 0))
    assert "gigaseal" not in f


def test_error_file_gives_a_rig_level_intake_finding(rules):
    fm = FileMeasures(path="x.abf", status="error", error="x.abf: truncated", error_kind="truncated")
    (f,) = judge(fm, "rig-a", _no_history, rules, 0)
    assert f.kind == "rig" and f.bad and f.rule == "intake_error" and f.open_after_files == 1
    assert "truncated" in f.limit_text and f.hint == "x.abf: truncated"


def _history_from(values, measure="hum_rms"):
    def history(mode, channel, name, *, clean_files=False):
        if name != measure:
            return []
        return [(1000.0 - i, v) for i, v in enumerate(values)]      # newest first
    return history


def test_hum_jump_flags_against_rig_history_with_mains_hint_and_safety_note(rules):
    rng = np.random.default_rng(1)
    past = list(0.1 * np.exp(rng.normal(0, 0.05, 30)))
    f = _by_rule(judge(_fm({"hum_rms": (0.5, "pA")}), "r", _history_from(past), rules, 0))
    assert f["hum_jump"].bad and f["hum_jump"].kind == "drift"
    assert "normal" in f["hum_jump"].limit_text
    assert "grounding" in f["hum_jump"].hint and SAFETY_NOTE in f["hum_jump"].hint
    assert "not a diagnosis" in f["hum_jump"].hint
    normal = _by_rule(judge(_fm({"hum_rms": (0.1, "pA")}), "r", _history_from(past), rules, 0))
    assert not normal["hum_jump"].bad and normal["hum_jump"].hint == ""


def test_hum_going_down_is_not_bad(rules):
    past = [0.1, 0.11, 0.09, 0.1, 0.12, 0.1, 0.095, 0.105, 0.1, 0.1, 0.11]
    f = _by_rule(judge(_fm({"hum_rms": (0.01, "pA")}), "r", _history_from(past), rules, 0))
    assert not f["hum_jump"].bad


def test_vibration_hint_names_the_grown_band(rules):
    past = [1.0, 1.05, 0.95, 1.0, 1.02, 0.98, 1.01, 0.99, 1.03, 0.97, 1.0]
    fm = _fm({"noise_rms": (3.0, "pA"), "band_rms_10_70": (3.0, "pA"),
              "band_rms_1k_corner": (1.0, "pA")})

    def history(mode, channel, name, *, clean_files=False):
        return [(1000.0 - i, v) for i, v in enumerate(past)]
    f = _by_rule(judge(fm, "r", history, rules, 0))
    assert f["noise_jump"].bad
    assert "vibration" in f["noise_jump"].hint and "headstage" not in f["noise_jump"].hint
    assert SAFETY_NOTE not in f["noise_jump"].hint


def test_new_rig_learns_and_says_so(rules):
    past = [0.1, 0.11, 0.09, 0.1]
    fs = judge(_fm({"hum_rms": (0.5, "pA")}), "r", _history_from(past), rules, 0)
    note = _by_rule(fs)["learning"]
    assert note.kind == "rig" and not note.bad and "learning: 4 of 10 files" in note.limit_text
    assert _by_rule(fs)["hum_jump"].learning
    fs = judge(_fm({"hum_rms": (0.5, "pA")}), "r", _history_from(past * 3), rules, 0)
    assert "learning" not in _by_rule(fs) and not _by_rule(fs)["hum_jump"].learning


def _charting(ref):
    """A chart source: the reference given, the chart as the previous finding left it."""
    from qcd.charts import ChartInput, ChartState
    state = {}

    def charts(mode, channel, measure, rule):
        return ChartInput(ref, ChartState.from_dict(state.get(rule.name)), at=len(state) + 1.0)
    return charts, state


def test_cusum_rule_flags_a_sustained_small_shift(rules):
    # a 1.5-sigma shift held file after file trips the CUSUM (k 0.5: +1 sigma a file, so past h
    # within h + 1 files; Page 1954) while robust z (4) stays quiet
    from qcd.charts import Reference
    rule = next(r for r in rules.history if r.name == "hum_drift")
    charts, state = _charting(Reference(0.0, 0.05, 40, 0.0, 0.0, log=True))
    rng = np.random.default_rng(3)
    past = list(np.exp(rng.normal(0.0, 0.05, 30)))
    bad = []
    for i in range(int(rule.h) + 2):
        f = _by_rule(judge(_fm({"hum_rms": (math.exp(0.075), "pA")}), "r", _history_from(past),
                           rules, 0, charts))
        state[rule.name] = f["hum_drift"].chart["state"]
        bad.append(f["hum_drift"].bad)
        assert not f["hum_jump"].bad
    assert bad[-1] and not bad[0]
    assert "x its reference median" in f["hum_drift"].limit_text


def test_rules_file_errors_name_file_and_key(tmp_path: Path):
    p = tmp_path / "bad.toml"
    p.write_text('[[limit]]\nname = "x"\nmeasure = "noise_rms"\nabove = "3 parsecs"\n')
    with pytest.raises(ConfigError, match=r"bad.toml: limit\[x\]\.above"):
        load_rules([p])
    p.write_text('[[history]]\nname = "x"\nmeasure = "noise_rms"\ntset = "z"\n')
    with pytest.raises(ConfigError, match=r"did you mean 'test'"):
        load_rules([p])


def test_later_rule_file_overrides_and_disables(tmp_path: Path):
    p = tmp_path / "lab.toml"
    p.write_text('[settings]\nlearning_files = 5\n'
                 '[[limit]]\nname = "access_high"\nmeasure = "access_resistance"\nabove = "20 MOhm"\n'
                 '[[limit]]\nname = "gigaseal"\nmeasure = "seal_resistance"\nbelow = "1 GOhm"\nenabled = false\n')
    r = load_rules([Path(load_rules().sources[0]), p])
    names = {x.name: x for x in r.limits}
    assert "gigaseal" not in names and names["access_high"].above == pytest.approx(20e6)
    assert r.settings.learning_files == 5 and r.settings.resolve_after_files == 3


@pytest.mark.parametrize("table, old, new", [
    ("settings", "for_files", "open_after_files"), ("settings", "clear_files", "resolve_after_files"),
    ("settings", "repeat_hours", "remind_hours"),
    ("settings", "intake_for_files", "intake_open_after_files"),
    ("limit", "for_files", "open_after_files"), ("history", "repeat_hours", "remind_hours")])
def test_a_renamed_lifecycle_key_is_refused_with_its_new_name(tmp_path: Path, table, old, new):
    p = tmp_path / "lab.toml"
    rule = '\nname = "x"\nmeasure = "noise_rms"\nabove = "3 pA"' if table == "limit" else \
        '\nname = "x"\nmeasure = "noise_rms"' if table == "history" else ""
    head = f"[{table}]" if table == "settings" else f"[[{table}]]"
    p.write_text(f"{head}{rule}\n{old} = 2\n")
    with pytest.raises(ConfigError) as ei:
        load_rules([p])
    assert "lab.toml" in str(ei.value) and f"write {new!r} instead of {old!r}" in str(ei.value)
    p.write_text(f"{head}{rule}\n{new} = 2\n")
    r = load_rules([p])
    got = r.settings if table == "settings" else (r.limits + r.history)[0]
    attr = {"remind_hours": "remind_h"}.get(new, new)
    assert getattr(got, attr) == 2


def test_strong_non_mains_line_suggests_switching_supplies(rules):
    past = [1.0, 1.05, 0.95, 1.0, 1.02, 0.98, 1.01, 0.99, 1.03, 0.97, 1.0]
    fm = _fm({"noise_rms": (3.0, "pA")})
    ch = fm.channels[0]
    ch.measures["spectral_lines"] = Measure("spectral_lines", [[1234.5, 1.2], [3000.0, 0.1]], "pA")

    def history(mode, channel, name, *, clean_files=False):
        return [(1000.0 - i, v) for i, v in enumerate(past)] if name == "noise_rms" else []
    f = _by_rule(judge(fm, "r", history, rules, 0))
    assert f["noise_jump"].bad and "switching power supplies" in f["noise_jump"].hint


def test_a_jump_opens_one_alert_not_two(rules):
    # a 5x jump: with a learned reference the step chart flags it (32 sigma on log values) and
    # the robust-z jump rule stands down; the drift chart is held and does not also flag
    rng = np.random.default_rng(1)
    past = list(0.1 * np.exp(rng.normal(0, 0.05, 30)))
    from qcd.charts import Reference
    charts, _ = _charting(Reference(math.log(0.1), 0.05, 40, 0.0, 0.0, log=True))
    f = _by_rule(judge(_fm({"hum_rms": (0.5, "pA")}), "r", _history_from(past), rules, 0,
                       charts))
    assert f["hum_step"].bad and f["hum_step"].open_after_files == 1
    assert not f["hum_jump"].bad and f["hum_jump"].clear
    assert "stands down" in f["hum_jump"].limit_text
    assert not f["hum_drift"].bad and not f["hum_drift"].clear
    assert "flagged by hum_step" in f["hum_drift"].limit_text
    # no reference learned yet (no charts): the robust z flags the same jump
    f = _by_rule(judge(_fm({"hum_rms": (0.5, "pA")}), "r", _history_from(past), rules, 0))
    assert f["hum_jump"].bad and "hum_step" not in f


def test_step_chart_on_a_provisional_reference_yields_to_the_jump_rule(rules):
    # while the reference is provisional the z rule keeps watching; the step chart it flags
    # with is held, and does not open a second alert
    from qcd.charts import ChartInput, ChartState, Reference
    rng = np.random.default_rng(1)
    past = list(0.1 * np.exp(rng.normal(0, 0.05, 30)))
    ref = Reference(math.log(0.1), 0.05, 10, 0.0, 0.0, log=True, widen=2.0)

    def charts(mode, channel, measure, rule):
        if rule.step:
            return ChartInput(ref, ChartState(), at=1.0, learning="learning", provisional=True)
        return ChartInput(None, ChartState(), at=1.0, learning="learning")
    f = _by_rule(judge(_fm({"hum_rms": (0.5, "pA")}), "r", _history_from(past), rules, 0,
                       charts))
    assert f["hum_jump"].bad
    assert not f["hum_step"].bad and "flagged by hum_jump" in f["hum_step"].limit_text
    assert not f["hum_drift"].bad and f["hum_drift"].learning


def test_holding_shift_uses_an_absolute_spread_floor(rules):
    # holding near 0 pA: tiny MAD; the 12.5 pA floor means only jumps > 50 pA flag (common practice)
    past = [0.001, -0.002, 0.0015, 0.0005, -0.001, 0.002, 0.0, -0.0005, 0.001, 0.0]
    hist = _history_from(past, measure="holding")
    small = _by_rule(judge(_fm({"holding": (-30.0, "pA")}), "r", hist, rules, 0))
    big = _by_rule(judge(_fm({"holding": (-80.0, "pA")}), "r", hist, rules, 0))
    assert not small["holding_shift"].bad and big["holding_shift"].bad


def test_field_example_rules_load_over_the_defaults(rules):
    field = Path(__file__).resolve().parent.parent / "rules" / "field.toml"
    r = load_rules([rules.sources[0], field])
    names = {x.name for x in r.limits} | {x.name for x in r.history}
    assert {"gigaseal", "field_noise_high", "field_hum_jump"} <= names
    # 25 uV against a 20 uV limit, in mV as stored for an extracellular channel
    fm = _fm({"noise_rms_1k": (0.025, "mV")}, mode="extracellular")
    assert _by_rule(judge(fm, "r", _no_history, r, 0))["field_noise_high"].bad


# --- noise-source hints: like with like -----------------------------------------------------------

_BANDS = ("band_rms_0p5_10", "band_rms_10_70", "band_rms_70_1k", "band_rms_1k_corner")


def _histories(normal: dict[str, float], n: int = 30, seed: int = 5):
    """Each measure's history: its normal value with 5 % lognormal scatter, newest first."""
    rng = np.random.default_rng(seed)
    rows = {k: [(1000.0 - i, v * math.exp(rng.normal(0, 0.05))) for i in range(n)]
            for k, v in normal.items()}
    return lambda mode, channel, name, *, clean_files=False: rows.get(name, [])


_NORMAL = {"noise_rms": 1.2, "noise_rms_1k": 0.9, "hum_rms": 0.26, "band_rms_0p5_10": 0.2,
           "band_rms_10_70": 0.25, "band_rms_70_1k": 0.5, "band_rms_1k_corner": 0.6}


def test_a_broadband_step_gives_the_broadband_hint_not_grounding(rules):
    # the headstage fault of the demo: every band x3.5, the hum unchanged but measured with a
    # large error because the floor beside the harmonics rose (hum_rms_se)
    now = {k: (v * 3.5, "pA") for k, v in _NORMAL.items() if k != "hum_rms"}
    now["hum_rms"] = (0.55, "pA")          # 2.1x its normal by noise alone ...
    now["hum_rms_se"] = (0.16, "pA")       # ... which its standard error covers
    f = _by_rule(judge(_fm(now), "r", _histories(_NORMAL), rules, 0))
    assert f["noise_jump"].bad
    hint = f["noise_jump"].hint
    assert "broadband" in hint and "headstage" in hint
    assert "grounding" not in hint and SAFETY_NOTE not in hint
    assert "slow fluctuation" not in hint and "vibration" not in hint
    # the hum rule itself: value -+ 2 SE reaches back into the normal range: not bad, and not
    # a clear either (the value cannot tell)
    assert not f["hum_jump"].bad and not f["hum_jump"].clear


def test_a_hum_creep_gives_the_grounding_hint_with_the_safety_caution(rules):
    now = {k: (v, "pA") for k, v in _NORMAL.items()}
    now["hum_rms"] = (0.6, "pA")
    now["hum_rms_se"] = (0.02, "pA")
    now["noise_rms"] = (1.3, "pA")
    f = _by_rule(judge(_fm(now), "r", _histories(_NORMAL), rules, 0))
    assert f["hum_jump"].bad
    assert "grounding" in f["hum_jump"].hint and SAFETY_NOTE in f["hum_jump"].hint
    assert "broadband" not in f["hum_jump"].hint


def test_a_noisy_hum_reading_counts_by_its_power_three_errors_down(rules):
    # a reading of the demo's headstage fault (bands 3.5x, hum unchanged): hum_rms 0.853 pA
    # with hum_rms_se 0.095 pA, i.e. power 0.728 pA^2 whose one SE, 0.171 pA^2, moves the RMS
    # up by 0.095 (sqrt(0.728 + 0.171) - sqrt(0.728), METHODS §4.2). Its lower bound 3 SE
    # down is sqrt(0.728 - 3 x 0.171) = 0.46 pA (arithmetic), short of 1.5x the clean
    # history's upper bounds (0.28 + 2 x 0.03 pA): broadband only. On the RMS scale,
    # 0.853 - 2 x 0.095 = 0.66 pA would have passed 1.5x and added the grounding hint.
    normal = dict(_NORMAL, hum_rms=0.28, hum_rms_se=0.03)
    now = {k: (v * 3.5, "pA") for k, v in _NORMAL.items() if k != "hum_rms"}
    now["hum_rms"], now["hum_rms_se"] = (0.853, "pA"), (0.095, "pA")
    f = _by_rule(judge(_fm(now), "r", _histories(normal), rules, 0))
    assert f["noise_jump"].bad
    assert "headstage" in f["noise_jump"].hint and "grounding" not in f["noise_jump"].hint
    # the same error on a hum that did grow: sqrt(2.25 - 3 x 0.294) = 1.17 pA, 3.4x the normal
    now["hum_rms"], now["hum_rms_se"] = (1.5, "pA"), (0.095, "pA")
    f = _by_rule(judge(_fm(now), "r", _histories(normal), rules, 0))
    assert "grounding" in f["noise_jump"].hint and "headstage" in f["noise_jump"].hint
    assert SAFETY_NOTE in f["noise_jump"].hint


def test_hints_compare_with_the_clean_history_and_the_rules_with_the_measures_own(rules):
    # a broadband fault older than the window: the measure's own history (files whose value
    # of it was not flagged) is full of fault-level bands, the clean one (files with no flag)
    # still holds the normal. The jump rule reads the first, the hint the second.
    fault = {k: v * 3.5 for k, v in _NORMAL.items() if k != "hum_rms"}
    own, clean = _histories(dict(_NORMAL, **fault)), _histories(_NORMAL)
    now = {k: (v, "pA") for k, v in fault.items()}
    now["noise_rms"] = (_NORMAL["noise_rms"] * 7.0, "pA")        # 2x the fault's level
    asked = []

    def history(mode, channel, name, *, clean_files=False):
        asked.append((name, clean_files))
        return (clean if clean_files else own)(mode, channel, name)
    f = _by_rule(judge(_fm(now), "r", history, rules, 0))
    assert f["noise_jump"].bad                   # 2x against the fault-level own history
    assert "broadband" in f["noise_jump"].hint and "headstage" in f["noise_jump"].hint
    assert ("noise_rms", False) in asked and ("band_rms_70_1k", True) in asked
    assert ("band_rms_70_1k", False) not in asked


def test_an_error_inside_the_history_is_not_retried_without_clean_files(rules):
    # a TypeError raised by the store's query itself propagates: it is not taken for a
    # history function that does not know clean_files and silently retried without it
    calls = []

    def history(mode, channel, name, *, clean_files=False):
        calls.append(clean_files)
        if clean_files:
            raise TypeError("unsupported operand in the query")
        return [(1000.0 - i, 1.2) for i in range(30)]
    with pytest.raises(TypeError, match="unsupported operand"):
        judge(_fm({"noise_rms": (5.0, "pA"), "band_rms_70_1k": (3.0, "pA")}), "r", history,
              rules, 0)
    assert calls.count(True) == 1


def test_a_band_counts_on_its_own_only_beyond_the_broadband_factor(rules):
    # the floor doubled everywhere, and 10-70 Hz grew 8x: broadband plus vibration
    now = {k: (v * 2.0, "pA") for k, v in _NORMAL.items() if k.startswith("band")}
    now["band_rms_10_70"] = (_NORMAL["band_rms_10_70"] * 8.0, "pA")
    now["noise_rms"] = (_NORMAL["noise_rms"] * 2.5, "pA")
    f = _by_rule(judge(_fm(now), "r", _histories(_NORMAL), rules, 0))
    hint = f["noise_jump"].hint
    assert "vibration" in hint and "broadband" in hint
    assert hint.index("vibration") < hint.index("broadband")      # biggest growth first
    assert "mid-band" not in hint and "slow fluctuation" not in hint


def test_a_limit_counts_a_value_with_an_error_only_when_its_whole_interval_is_beyond(rules):
    # access_change_pct with its standard error against the 20 % limit on |change| (common
    # practice): 30 +- 2 % is beyond it, 24 +- 5 % could be inside it (neither bad nor clear),
    # -3 +- 15 % spans zero change (its |interval| starts at 0: not bad)
    def check(value, se):
        fm = _fm({"access_change_pct": (value, "%"), "access_change_pct_se": (se, "%")})
        return _by_rule(judge(fm, "r", _no_history, rules, 0))["access_change"]
    assert check(30.0, 2.0).bad
    f = check(24.0, 5.0)
    assert not f.bad and not f.clear
    f = check(-3.0, 15.0)
    assert not f.bad and not f.clear
    assert check(5.0, 1.0).clear and not check(5.0, 1.0).bad


def test_a_learned_reference_floors_the_jump_rules_window_scale(rules):
    # a window of files from one quiet day (log sd 0.05) makes 1.5x look like z = 8; the rig's
    # reference, learned over weeks, says its files scatter by 0.2 in log units: z about 2
    # (robust z, Iglewicz & Hoaglin 1993: the window's median, the wider of the two scales)
    from qcd.charts import Reference
    rng = np.random.default_rng(11)
    past = list(0.1 * np.exp(rng.normal(0, 0.05, 30)))
    fm = _fm({"hum_rms": (0.15, "pA")})
    alone = _by_rule(judge(fm, "r", _history_from(past), rules, 0))
    assert alone["hum_jump"].bad
    charts, _ = _charting(Reference(math.log(0.1), 0.2, 60, 0.0, 0.0, log=True))
    floored = _by_rule(judge(fm, "r", _history_from(past), rules, 0, charts))
    z = math.log(0.15 / float(np.median(past))) / 0.2
    assert not floored["hum_jump"].bad and f"robust z {z:+.1f}" in floored["hum_jump"].limit_text


def test_a_field_channels_hum_is_said_in_microvolts_as_the_report_shows_it(rules):
    # a field channel stores its measures in mV; its hum is a few uV (the demo's field rig:
    # 0.006088 mV against a normal near 0.00325 mV). The message gives the value and the
    # normal range in uV, as the report's table does (1 mV = 1000 uV, SI prefixes).
    from qcd.alerts import advance
    from qcd.ruleset import RuleSettings
    rng = np.random.default_rng(3)
    past = list(0.00325 * np.exp(rng.normal(0, 0.05, 30)))
    f = _by_rule(judge(_fm({"hum_rms": (0.006088, "mV")}), "r", _history_from(past), rules, 0))
    text = f["hum_jump"].limit_text
    assert f["hum_jump"].bad and "uV" in text and "mV" not in text
    median = float(text.split("(median ")[1].split(",")[0])
    assert median == pytest.approx(np.median(past) * 1000, rel=1e-2)
    states, msgs = {}, []
    for t in (0.0, 600.0, 1200.0):
        states, out = advance(states, [f["hum_jump"]], (), t, RuleSettings())
        msgs += out
    assert msgs and "value: 6.088 uV; normal " in msgs[0].body
    assert "mV" not in msgs[0].body


def test_hum_jump_takes_its_interval_on_the_power_of_a_sinusoid_in_white_noise(rules):
    # the rig's hum: a 50 Hz sinusoid of amplitude sqrt(2) pA, RMS A/sqrt(2) = 1 pA, power
    # P = A^2/2 = 1 pA^2 (analytic). The history's logs are 0 and -+0.05: median 1 pA, robust
    # SD 1.4826 x 0.05 = 0.0741, so z > 4 needs a reading above exp(0.2965) = 1.345 pA.
    # A file with the broadband floor raised reads the unchanged hum 1.9 standard errors high:
    # P^ = 1 + 1.9 x 2 = 4.8 pA^2 with se_P = 2 pA^2 (the band power minus the floor beside it,
    # an error symmetric on the power; METHODS §4.2, §4.5), so RMS 2.191 pA and
    # rms_se = sqrt(6.8) - sqrt(4.8) = 0.417 pA (qcd.measures.mains.Hum). On the power the
    # 2-SE interval is sqrt(4.8 -+ 4) = 0.894 ... 2.97 pA and holds the true 1 pA: not a jump.
    # On the RMS scale, 2.191 - 2 x 0.417 = 1.357 pA would have called it one.
    from qcd.measures.mains import Hum

    def reading(power, power_se):
        h = Hum(50.0, 50.0, "declared", False, None, ((1, 50.0, power, power_se),), power,
                power_se)
        return {"hum_rms": (h.rms, "pA"), "hum_rms_se": (h.rms_se, "pA")}
    past = [math.exp(d) for d in (0.0, 0.05, -0.05) * 10 + (0.0,)]
    now = reading(4.8, 2.0)
    assert now["hum_rms"][0] - 2 * now["hum_rms_se"][0] > math.exp(4 * 1.4826 * 0.05)
    f = _by_rule(judge(_fm(now), "r", _history_from(past), rules, 0))["hum_jump"]
    assert not f.bad and not f.clear                     # the value cannot tell
    # a hum that did grow, to RMS 2.5 pA (P = 6.25 pA^2), read with the same error: the power's
    # lower end sqrt(6.25 - 4) = 1.5 pA is beyond 1.345 pA: a jump
    f = _by_rule(judge(_fm(reading(6.25, 2.0)), "r", _history_from(past), rules, 0))["hum_jump"]
    assert f.bad
    # and one whose lower end sqrt(3.6 - 2 x 1.0) = 1.265 pA falls short is not
    f = _by_rule(judge(_fm(reading(3.6, 1.0)), "r", _history_from(past), rules, 0))["hum_jump"]
    assert not f.bad


# --- the judge's plain-Python statistics against numpy (the reference), bit for bit -----------

def _windows(seed: int = 7):
    """History windows as the judge sees them: 1-60 finite values, normal, log-normal, rounded
    (ties) and of any magnitude."""
    rng = np.random.default_rng(seed)
    for i in range(4000):
        n = int(rng.integers(1, 61))
        yield [float(v) for v in (
            rng.normal(3.0, 1.0, n), rng.lognormal(0.0, 2.0, n), np.round(rng.normal(0, 5, n), 1),
            rng.normal(0.0, 1.0, n) * 10.0 ** int(rng.integers(-15, 15)))[i % 4]]


def test_baseline_is_numpy_median_and_mad_to_the_last_bit():
    # reference: numpy.median (and scipy's normal-scaled MAD for the scale's definition)
    from qcd.measures.noise import MAD_SCALE
    for x in _windows():
        a = np.asarray(x)
        med = float(np.median(a))
        scale = MAD_SCALE * float(np.median(np.abs(a - med)))
        assert baseline(x) == (med, max(scale, 1e-300))
        assert math.isclose(baseline(x)[1], max(median_abs_deviation(a, scale="normal"),
                                                1e-300), rel_tol=1e-9)
    # non-finite values go through numpy itself: nan propagates as numpy's median does
    assert math.isnan(baseline([1.0, float("nan"), 2.0])[0])
    for odd in ([1.0, math.inf, 2.0], [1e308, 1e308, -1e308, 5.0]):   # inf; a sum that overflows
        a = np.asarray(odd)
        med = float(np.median(a))
        assert baseline(odd) == (med, max(MAD_SCALE * float(np.median(np.abs(a - med))), 1e-300))
    with pytest.raises(ValueError):
        baseline([])


def test_normal_range_text_is_numpy_percentiles_and_median():
    # reference: numpy.percentile (default linear method) and numpy.median, same format
    from qcd.judge import _normal_range, _percentiles
    for x in _windows(11):
        lo, hi = np.percentile(x, [10, 90])
        assert _percentiles(x, (10, 90)) == [lo, hi]
        med = float(np.median(x))
        if med > 0:
            assert f"(median {med:.3g}, {len(x)} files)" in _normal_range(x, "")
        assert f"normal {lo:.3g}-{hi:.3g}" in _normal_range(x, "")
