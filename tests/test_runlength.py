"""Average run lengths by the Brook-Evans Markov chain against published tables, and the limits
the rule loader picks for a false-alarm budget (docs/methods.md §11; OPERATIONS §2)."""
from __future__ import annotations

import textwrap

import pytest

from qcd.errors import ConfigError
from qcd.ruleset import load_rules
from qcd.runlength import (WIDEN_GRID, cusum_arl, cusum_h_for, ewma_arl, ewma_L_for, false_rates,
                           widen_for)

SHIFTS = (0, .25, .5, .75, 1, 1.5, 2, 2.5, 3, 4, 5)
# Lucas & Crosier (1982) Table 1, two-sided CUSUM k = 0.5, h = 4 (as quoted in R spc)
LC_H4 = (168, 74.2, 26.6, 13.3, 8.38, 4.75, 3.34, 2.62, 2.19, 1.71, 1.31)
# the same design with h = 5 (recomputed in OPERATIONS §2 with a 600-state chain)
LC_H5 = (465, 139, 38.0, 17.0, 10.4, 5.75, 4.01, 3.11, 2.57, 2.01, 1.69)
# Lucas & Saccucci (1990) Table 3, two-sided EWMA (as quoted in R spc)
LS_SHIFTS = (0, .25, .5, .75, 1, 1.5, 2, 3)
LS_05 = (500, 255, 88.8, 35.9, 17.5, 6.53, 3.63, 1.93)
LS_003 = (500, 76.7, 29.3, 17.6, 12.6, 8.07, 5.99, 4.03)


def _sig(x: float, digits: int = 3) -> float:
    return float(f"{x:.{digits}g}")


@pytest.mark.parametrize("shift,table", list(zip(SHIFTS, LC_H4)))
def test_cusum_h4_reproduces_lucas_crosier(shift, table):
    assert _sig(cusum_arl(0.5, 4.0, shift, side="both")) == pytest.approx(table, rel=2e-3)


@pytest.mark.parametrize("shift,table", list(zip(SHIFTS, LC_H5)))
def test_cusum_h5_reproduces_the_recomputed_table(shift, table):
    assert _sig(cusum_arl(0.5, 5.0, shift, side="both")) == pytest.approx(table, rel=2e-3)


@pytest.mark.parametrize("lam,L,table", [(0.5, 3.071, LS_05), (0.03, 2.437, LS_003)])
def test_ewma_reproduces_lucas_saccucci(lam, L, table):
    got = [ewma_arl(lam, L, s, side="both") for s in LS_SHIFTS]
    # the table's 3 significant digits; its ARL0 of 500 is the design value, within 0.5 %
    assert got[0] == pytest.approx(500, rel=5e-3)
    assert [_sig(g) for g in got[1:]] == pytest.approx(list(table[1:]), rel=2e-3)


def test_ewma_matches_the_sas_qc_value():
    # SAS/QC, quoted in R spc: lambda 0.25, L 3, 1 sigma -> ARL 11.154267016 (4 digits here)
    assert ewma_arl(0.25, 3.0, 1.0, side="both") == pytest.approx(11.154267016, rel=1e-4)


def test_one_sided_limits_for_3000_files_agree_with_the_known_parameter_simulation():
    # OPERATIONS §2 (simulation, iid normal, one-sided upper, about 5 %): EWMA lambda 0.2,
    # L 3.3 -> ~3000; lambda 0.1, L 3.2 -> ~3200; CUSUM k 0.5, h 6 -> ~2800
    assert ewma_arl(0.2, 3.3, side="up") == pytest.approx(3000, rel=0.05)
    assert ewma_arl(0.1, 3.2, side="up") == pytest.approx(3200, rel=0.05)
    assert cusum_arl(0.5, 6.0, side="up") == pytest.approx(2800, rel=0.1)


def test_limit_search_inverts_the_run_length():
    L = ewma_L_for(3000.0, 0.2, side="up")
    h = cusum_h_for(3000.0, 0.5, side="up")
    assert ewma_arl(0.2, L, side="up") == pytest.approx(3000, rel=2e-3)
    assert cusum_arl(0.5, h, side="up") == pytest.approx(3000, rel=2e-3)
    assert 3.2 < L < 3.4 and 6.0 < h < 6.3


def test_a_rule_with_arl0_gets_its_limit_and_refuses_both(tmp_path):
    p = tmp_path / "r.toml"
    p.write_text(textwrap.dedent("""
        [[history]]
        name = "d"
        measure = "hum_rms"
        test = "cusum"
        side = "up"
        arl0_files = 500
        """), encoding="utf-8")
    rule = load_rules([p]).history[0]
    assert rule.arl0_files == 500
    assert cusum_arl(0.5, rule.h, side="up") == pytest.approx(500, rel=2e-3)
    p.write_text(p.read_text() + "h = 5\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="arl0_files or h"):
        load_rules([p])


def test_shipped_chart_rules_state_their_budget():
    # each shipped chart's limit is the one whose Brook-Evans ARL is its budget (one-sided)
    from qcd.config import default_rules_path
    field = default_rules_path().with_name("field.toml")
    rules = {r.name: r for r in load_rules([default_rules_path(), field]).history}
    for name in ("hum_drift", "noise_drift", "hum_step", "noise_step", "field_noise_drift"):
        r = rules[name]
        assert r.arl0_files >= 3000
        assert cusum_arl(r.k, r.h, side="up") == pytest.approx(r.arl0_files, rel=2e-3)
    # one budget for the drift charts of both rule files
    assert rules["field_noise_drift"].arl0_files == rules["noise_drift"].arl0_files
    assert rules["hum_step"].step and rules["hum_step"].open_after_files == 1


def _p_within_two(k: float, h: float, shift: float) -> float:
    """P(an upper CUSUM from 0 signals at file 1 or 2 after a step of ``shift`` sigma), by
    numeric integration over the first file (Page 1954 recursion, iid normal)."""
    from scipy.integrate import quad
    from scipy.stats import norm
    first = norm.sf(k + h - shift)                       # S1 = x1 - k > h
    # S1 = max(0, x1 - k) <= h, then S1 + x2 - k > h
    at_zero = norm.cdf(k - shift) * norm.sf(k + h - shift)
    inside, _ = quad(lambda s: norm.pdf(s + k - shift) * norm.sf(h - s + k - shift), 0.0, h)
    return first + at_zero + inside


def test_step_chart_constants_catch_a_doubling_within_two_files_at_known_parameters():
    # a 2x step at 20 % log scatter is ln 2 / 0.2 = 3.47 sigma; the shipped step chart
    # (k 1.25, h for its budget) signals by the 2nd stepped file with probability ~0.86 when
    # the reference is known; 2 bad files in a row of the drift chart would need far more
    r = {x.name: x for x in load_rules().history}["noise_step"]
    p = _p_within_two(r.k, r.h, 3.4657)
    assert 0.83 < p < 0.92
    # the same integral reproduces the Markov chain's one-file run length at a big shift:
    # ARL = 1/P(signal) when a single file always decides (shift far beyond k + h)
    assert _p_within_two(r.k, r.h, 12.0) == pytest.approx(1.0, abs=1e-9)
    assert cusum_arl(r.k, r.h, 12.0, side="up") == pytest.approx(1.0, abs=1e-6)


def test_estimated_reference_widening_is_one_for_a_known_reference_and_grows_as_it_shrinks():
    # a reference of 4000 independent files is as good as known: the Monte Carlo rate of the
    # chart on it matches the Brook-Evans budget, so no widening (within Monte Carlo error)
    h = cusum_h_for(3000, 0.5)
    known = widen_for("cusum", "up", 0.5, h, 3000, files=4000, days=1000, per_day=4, icc=0.0,
                      rho=0.0)
    assert known == pytest.approx(1.0, abs=0.05)
    # a reference from 80 files over 20 days has an estimated scale (1.4826 MAD: relative
    # error about 1.2/sqrt(80), Rousseeuw & Croux 1993): wider; 10 files over 3 days, wider still
    mid = widen_for("cusum", "up", 0.5, h, 3000, files=80, days=20, per_day=4, icc=0.0, rho=0.0)
    few = widen_for("cusum", "up", 0.5, h, 3000, files=10, days=3, per_day=4, icc=0.0, rho=0.0)
    assert 1.05 < mid < 1.5 and few > mid
    # two signalling files in a row to open an alert: fewer false alerts, less widening
    assert widen_for("cusum", "up", 0.5, h, 3000, files=80, days=20, per_day=4, icc=0.0,
                     rho=0.0, opens=2) < mid
    # the simulated false-alarm rate falls as the limits widen (same random numbers)
    rates = false_rates("cusum", "up", 0.5, h, 80, 20, 4, 0.0, 0.0, 1.0)
    assert len(rates) == len(WIDEN_GRID)
    assert all(b <= a for a, b in zip(rates, rates[1:]))


def test_qn_is_consistent_for_the_normal_sd_and_more_efficient_than_the_mad():
    # Rousseeuw & Croux (1993): Qn with its small-sample factors is unbiased for sigma at the
    # normal and has 82 % asymptotic efficiency (the MAD 37 %): variance ratio about 0.45
    import numpy as np
    from qcd.runlength import qn_scale
    rng = np.random.default_rng(7)
    for n in (5, 10, 11, 20, 80):
        q = qn_scale(rng.standard_normal((8000, n)))
        assert q.mean() == pytest.approx(1.0, abs=0.02)
    x = rng.standard_normal((4000, 80))
    q = qn_scale(x)
    mad = 1.482602218505602 * np.median(np.abs(x - np.median(x, axis=1)[:, None]), axis=1)
    assert 0.35 < q.var() / mad.var() < 0.6
