"""Sequential drift charts through the real judge and store: worked examples one file at a
time across a restart, a creep the chart is not re-centred on, a kill -9 between files, files
out of recording order, and a re-learn."""
from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import textwrap
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest

from qcd import pipeline
from qcd.charts import ChartState, Reference
from qcd.config import RigConfig
from qcd.history import day_icc, learn
from qcd.results import ChannelMeasures, FileMeasures, Measure
from qcd.ruleset import load_rules
from qcd.store import Store

from stored import outbox_rows, seed_chart
from test_judge import CUSUM_DOWN, CUSUM_UP, CUSUM_X, EWMA_X, EWMA_Z

RIG = RigConfig("rig-c", ())
T0 = datetime(2026, 9, 1, 8, 0, tzinfo=timezone.utc).timestamp()


def fm(value: float, at: float, measure: str = "holding", unit: str = "pA") -> FileMeasures:
    ch = ChannelMeasures(index=0, name="IN 0", unit=unit, dimension="A",
                         measures={measure: Measure(measure, value, unit)})
    return FileMeasures(path=f"/data/{measure}-{at:.0f}.abf", status="ok",
                        mode="voltage_clamp", channels=(ch,),
                        recorded_at=datetime.fromtimestamp(at, timezone.utc),
                        sha256=f"{hash((measure, value, at)) & (2**64 - 1):064x}")


def rules_file(tmp_path: Path, body: str, name: str = "r.toml"):
    p = tmp_path / name
    p.write_text(textwrap.dedent(body), encoding="utf-8")
    return load_rules([p])


def chart_of(store: Store, rule: str, measure: str = "holding") -> dict:
    return store.charts(RIG.name)[("voltage_clamp", 0, measure, rule)]


def finding(store: Store, rule: str) -> dict:
    last = store.files(rig=RIG.name)[-1]
    return next(f for f in store.findings(last["id"]) if f["rule"] == rule)


# --- NIST/SEMATECH worked examples, one file at a time, across a restart ----------------------

def test_nist_ewma_example_one_file_at_a_time_across_a_restart(tmp_path):
    # NIST/SEMATECH e-Handbook 6.3.2.4: EWMA_0 = 50, s = 2.0539, lambda = 0.3, L = 3;
    # every EWMA to 2 dp, and no point signals (OPERATIONS §2, recomputed there)
    rules = rules_file(tmp_path, """
        [[history]]
        name = "hold_ewma"
        measure = "holding"
        test = "ewma"
        side = "both"
        lambda = 0.3
        L = 3
        """)
    db = tmp_path / "q.sqlite"
    with Store(db) as s:
        seed_chart(s, RIG.name, dict(mode="voltage_clamp", channel=0, measure="holding",
                                     rule="hold_ewma", start_at=None,
                                     state=ChartState(since=0.0).to_dict(),
                                     ref=Reference(50.0, 2.0539, 20, 0.0, 0.0).to_dict()))
    got = []
    for half in (EWMA_X[:10], EWMA_X[10:]):                 # a restart between the halves
        with Store(db) as s:
            for x in half:
                at = T0 + 3600.0 * len(got)
                pipeline.commit(fm(x, at), RIG, s, rules, at + 60)
                got.append(50.0 + chart_of(s, "hold_ewma")["state"]["up"] * 2.0539)
                assert not finding(s, "hold_ewma")["bad"]
    assert [round(z, 2) for z in got] == EWMA_Z


def test_nist_cusum_example_one_file_at_a_time_across_a_restart(tmp_path):
    # NIST/SEMATECH e-Handbook 6.3.2.3: target 325, k = 0.3175, h = 4.1959 (scale 1); S+ and
    # S- to abs 0.01 (the page rounds halves both ways); the first signal is group 14
    rules = rules_file(tmp_path, """
        [[history]]
        name = "hold_cusum"
        measure = "holding"
        test = "cusum"
        side = "both"
        k = 0.3175
        h = 4.1959
        """)
    db = tmp_path / "q.sqlite"
    with Store(db) as s:
        seed_chart(s, RIG.name, dict(mode="voltage_clamp", channel=0, measure="holding",
                                     rule="hold_cusum", start_at=None,
                                     state=ChartState(since=0.0).to_dict(),
                                     ref=Reference(325.0, 1.0, 20, 0.0, 0.0).to_dict()))
    up, down, bad = [], [], []
    for half in (CUSUM_X[:13], CUSUM_X[13:]):
        with Store(db) as s:
            for x in half:
                at = T0 + 3600.0 * len(up)
                pipeline.commit(fm(x, at), RIG, s, rules, at + 60)
                st = chart_of(s, "hold_cusum")["state"]
                up.append(st["up"])
                down.append(st["down"])
                bad.append(finding(s, "hold_cusum")["bad"])
    assert up == pytest.approx(CUSUM_UP, abs=0.01)
    assert down == pytest.approx(CUSUM_DOWN, abs=0.01)
    assert bad.index(True) == 13 and all(bad[13:])


# --- the reference: learned, fixed, and the chart is not re-centred ---------------------------

HUM_RULES = """
    [settings]
    reference_files = 12
    reference_days = 3
    [[history]]
    name = "hum_jump"
    measure = "hum_rms"
    test = "z"
    side = "up"
    log = true
    z = 4
    [[history]]
    name = "hum_drift"
    measure = "hum_rms"
    test = "ewma"
    side = "up"
    log = true
    lambda = 0.2
    L = 3.1
    """


# the chart on its own (no jump rule holding it at its limit)
CHART_ONLY = HUM_RULES.replace("""    [[history]]
    name = "hum_jump"
    measure = "hum_rms"
    test = "z"
    side = "up"
    log = true
    z = 4
""", "")


def _stable(n: int, seed: int = 5) -> list[float]:
    rng = np.random.default_rng(seed)
    return list(0.1 * np.exp(rng.normal(0.0, 0.1, n)))


def _feed(store, rules, values, start=0, per_day=4, measure="hum_rms"):
    for i, v in enumerate(values, start=start):
        at = T0 + 86400.0 * (i // per_day) + 7200.0 * (i % per_day)
        pipeline.commit(fm(v, at, measure), RIG, store, rules, at + 60)


def test_the_reference_learns_then_stays_fixed_and_a_creep_raises_the_chart_monotonically(
        tmp_path):
    rules = rules_file(tmp_path, CHART_ONLY)
    assert [r.name for r in rules.history] == ["hum_drift"]
    with Store(tmp_path / "q.sqlite") as s:
        _feed(s, rules, _stable(12))
        # the 12th file sees 11 before it, over 2.2 days: still learning (3 days asked), and says so
        assert chart_of(s, "hum_drift", "hum_rms")["ref"] is None
        assert "learning the reference: 11 of 12 files, 2.2 of 3 days" in \
            finding(s, "hum_drift")["limit_text"]
        _feed(s, rules, _stable(4, 6), start=12)
        ref = chart_of(s, "hum_drift", "hum_rms")["ref"]
        assert ref is not None and ref["n"] == 13       # 13 files span the 3 days
        # a creep of +5 % a file: the statistic rises at every file, the reference stays put
        creep = [math.exp(ref["center"]) * 1.05 ** k for k in range(1, 25)]
        stats = []
        for k, v in enumerate(creep):
            _feed(s, rules, [v], start=16 + k)
            stats.append(chart_of(s, "hum_drift", "hum_rms")["state"]["up"])
            assert chart_of(s, "hum_drift", "hum_rms")["ref"] == ref
        assert all(b > a for a, b in zip(stats, stats[1:]))
        text = finding(s, "hum_drift")["limit_text"]
        assert "x its reference median of 2026-09-01" in text and "EWMA" in text
        assert any(a["rule"] == "hum_drift" for a in s.open_alerts(RIG.name))


def test_files_out_of_recording_order_are_charted_in_recording_order(tmp_path):
    rules = rules_file(tmp_path, HUM_RULES)
    vals = _stable(16) + [0.1 * 1.02 ** k for k in range(1, 13)]   # under the jump rule
    with Store(tmp_path / "a.sqlite") as a, Store(tmp_path / "b.sqlite") as b:
        _feed(a, rules, vals)
        _feed(b, rules, vals[:20])
        order = list(range(20, len(vals)))
        np.random.default_rng(2).shuffle(order)         # a backlog arriving in any order
        for i in order:
            _feed(b, rules, [vals[i]], start=i)
        sa = chart_of(a, "hum_drift", "hum_rms")["state"]
        sb = chart_of(b, "hum_drift", "hum_rms")["state"]
        assert sb["up"] == pytest.approx(sa["up"], rel=1e-12) and sb["n"] == sa["n"]


KILLED = """
    import sys, time
    from pathlib import Path
    sys.path.insert(0, "tests")
    from qcd.store import Store
    from test_charts import HUM_RULES, _feed, _stable, rules_file
    rules = rules_file(Path(sys.argv[2]), HUM_RULES, "child.toml")
    vals = _stable(16) + [0.1 * 1.04 ** k for k in range(1, 13)]
    with Store(sys.argv[1]) as s:
        _feed(s, rules, vals[:22])
        Path(sys.argv[3]).write_text("between files")
        time.sleep(120)
"""


def test_a_kill_between_files_loses_no_chart_state(tmp_path):
    rules = rules_file(tmp_path, HUM_RULES)
    vals = _stable(16) + [0.1 * 1.04 ** k for k in range(1, 13)]
    db, marker = tmp_path / "killed.sqlite", tmp_path / "marker"
    proc = subprocess.Popen([sys.executable, "-c", textwrap.dedent(KILLED), str(db),
                             str(tmp_path), str(marker)],
                            cwd=Path(__file__).resolve().parent.parent, stderr=subprocess.PIPE,
                            text=True)
    try:
        deadline = time.monotonic() + 60
        while not marker.exists():
            assert proc.poll() is None, proc.stderr.read()
            assert time.monotonic() < deadline, "the child never got between files"
            time.sleep(0.02)
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL
    with Store(db) as s, Store(tmp_path / "whole.sqlite") as whole:
        _feed(s, rules, vals[22:], start=22)            # the service starts again
        _feed(whole, rules, vals)                       # never interrupted
        assert chart_of(s, "hum_drift", "hum_rms") | {"updated_at": 0} == \
            chart_of(whole, "hum_drift", "hum_rms") | {"updated_at": 0}


def test_a_relearn_resolves_with_a_message_resets_the_chart_and_leaves_a_note(tmp_path):
    rules = rules_file(tmp_path, HUM_RULES)
    with Store(tmp_path / "q.sqlite") as s:
        _feed(s, rules, _stable(16) + [0.1 * 1.06 ** k for k in range(1, 30)])
        open_keys = [a["key"] for a in s.open_alerts(RIG.name)]
        assert any(k.endswith("|hum_drift") for k in open_keys)
        last = s.files(rig=RIG.name)[-1]["recorded_at"]
        charts, resolved = pipeline.relearn(s, rules, RIG.name, last + 1, last + 60,
                                            measures=["hum_rms"], why="new headstage")
        assert ("voltage_clamp", 0, "hum_rms", "hum_drift") in charts
        assert set(open_keys) <= set(resolved) and not s.open_alerts(RIG.name)
        row = chart_of(s, "hum_drift", "hum_rms")
        assert row["ref"] is None and row["state"] == {} and row["start_at"] == last + 1
        body = outbox_rows(s)[-1]["body"]
        assert "re-learned" in body and "new headstage" in body
        note = s.notes(RIG.name)[-1]
        assert note["kind"] == "relearn" and "hum_rms" in note["text"]
        # the new normal (3x the old one) is learned, not flagged
        _feed(s, rules, [0.3 * v / 0.1 for v in _stable(20, 9)], start=46)
        assert not [f for f in s.findings(s.files(rig=RIG.name)[-1]["id"]) if f["bad"]]
        assert "learning the reference" in finding(s, "hum_drift")["limit_text"] or \
            chart_of(s, "hum_drift", "hum_rms")["ref"]["center"] > math.log(0.2)


def test_an_alert_that_resolves_by_itself_resets_the_chart_but_keeps_the_reference(tmp_path):
    rules = rules_file(tmp_path, HUM_RULES)
    with Store(tmp_path / "q.sqlite") as s:
        _feed(s, rules, _stable(16) + [0.1 * 1.3] * 6)
        assert any(a["rule"] == "hum_drift" for a in s.open_alerts(RIG.name))
        ref = chart_of(s, "hum_drift", "hum_rms")["ref"]
        _feed(s, rules, [0.1] * 20, start=22)
        assert not any(a["rule"] == "hum_drift" for a in s.open_alerts(RIG.name))
        row = chart_of(s, "hum_drift", "hum_rms")
        assert row["ref"] == ref                         # no re-learn: the same normal
        assert row["state"]["since"] is not None and row["state"]["n"] < 20


# --- the reference statistics ------------------------------------------------------------------

def test_day_icc_finds_a_shared_day_effect_and_none_without_one():
    # one-way ANOVA estimator (Snedecor & Cochran): day sd 0.2, file sd 0.05 -> icc 0.94
    rng = np.random.default_rng(4)
    days = np.repeat(np.arange(60), 4)
    t = days * 86400.0 + np.tile(np.arange(4) * 3600.0, 60)
    y = rng.normal(0, 0.2, 60)[days] + rng.normal(0, 0.05, 240)
    icc, per_day = day_icc(t, y)
    assert per_day == 4 and icc == pytest.approx(0.2 ** 2 / (0.2 ** 2 + 0.05 ** 2), abs=0.04)
    icc0, _ = day_icc(t, rng.normal(0, 0.2, 240))
    assert icc0 < 0.1


def test_day_autocorrelation_finds_a_carried_day_effect():
    # AR(1) day means with coefficient 0.6 over 400 days: lag-1 autocorrelation ~0.6 (Box &
    # Jenkins: r1 estimates phi; sd about 1/sqrt(n))
    from qcd.history import day_autocorrelation
    rng = np.random.default_rng(8)
    d = np.zeros(400)
    for i in range(1, 400):
        d[i] = 0.6 * d[i - 1] + rng.normal()
    t = np.arange(400) * 86400.0
    assert day_autocorrelation(t, d) == pytest.approx(0.6, abs=0.1)
    assert day_autocorrelation(t, rng.normal(size=400)) < 0.1


def test_learn_waits_for_files_and_days():
    rows = [(T0 + 3600.0 * i, 1.0 + 0.01 * (i % 5)) for i in range(100)]
    assert learn(rows[:30], files=40, days=1, log=True) is None          # too few files
    assert learn(rows[:48], files=40, days=3, log=True) is None          # under 3 days
    ref = learn(rows, files=40, days=1, log=True)
    assert ref.n == 40 and ref.log and ref.median == pytest.approx(1.02)


def test_day_inflation_is_one_for_independent_files_and_m_for_identical_days():
    # docs/methods.md §7 (derived): icc 0 -> 1; icc 1 with a long EWMA memory -> m files a day;
    # CUSUM: the design effect 1 + (m - 1) icc of a day's mean (Kish 1965)
    from qcd.charts import inflation
    from qcd.ruleset import HistoryRule
    ewma = HistoryRule("e", "hum_rms", test="ewma", lam=0.01)
    cusum = HistoryRule("c", "hum_rms", test="cusum")
    ref = Reference(0.0, 0.1, 40, 0.0, 0.0, log=True, icc=0.0, per_day=4)
    assert inflation(ewma, ref) == 1.0
    ref = Reference(0.0, 0.1, 40, 0.0, 0.0, log=True, icc=1.0, per_day=4)
    assert inflation(ewma, ref) == pytest.approx(4.0, rel=0.02)
    half = Reference(0.0, 0.1, 40, 0.0, 0.0, log=True, icc=0.5, per_day=4)
    assert inflation(cusum, half) == pytest.approx(2.5)
    carried = Reference(0.0, 0.1, 40, 0.0, 0.0, log=True, icc=0.5, per_day=4, rho=0.3)
    assert inflation(cusum, carried) == pytest.approx(2.5 + 1.2 / 0.7)
    # EWMA with a long memory approaches the CUSUM's long-run factor
    assert inflation(ewma, carried) == pytest.approx(2.5 + 1.2 / 0.7, rel=0.03)


def test_the_report_shades_the_reference_band_and_names_it(tmp_path):
    from qcd.report import build_report, render_html
    rules = rules_file(tmp_path, HUM_RULES)
    with Store(tmp_path / "q.sqlite") as s:
        _feed(s, rules, _stable(16))
        ref = Reference.from_dict(chart_of(s, "hum_drift", "hum_rms")["ref"])
        now = s.files(rig=RIG.name)[-1]["recorded_at"] + 3600.0
        rep = build_report(s, now, now - 86400.0)
    (trend,) = [t for t in rep.rigs[0].trends if t.measure == "hum_rms"]
    # median and +-3 robust SD of the reference on the log scale (docs/methods.md §7)
    assert trend.band == pytest.approx((math.exp(ref.center - 3 * ref.scale),
                                        math.exp(ref.center),
                                        math.exp(ref.center + 3 * ref.scale)))
    assert trend.band_label == "reference 2026-09-01...09-04 (13 files, +-3 robust SD)"
    assert rep.to_json()["rigs"][0]["trends"][0]["band_label"].startswith("reference")
    assert "<img" in render_html(rep)


@pytest.mark.slow
def test_a_following_reference_keeps_behind_its_guard_gap(tmp_path):
    # follow_days = 2, follow_files = 4: the reference moves with a slow change of the rig's
    # normal, but only from files recorded over 2 days and 4 files before the one judged
    rules = rules_file(tmp_path, CHART_ONLY.replace(
        "reference_days = 3", "reference_days = 3\n    follow_days = 2\n    follow_files = 4"))
    with Store(tmp_path / "q.sqlite") as s:
        _feed(s, rules, _stable(16))
        first = Reference.from_dict(chart_of(s, "hum_drift", "hum_rms")["ref"])
        _feed(s, rules, [0.12 * v / 0.1 for v in _stable(40, 3)], start=16)
        ref = Reference.from_dict(chart_of(s, "hum_drift", "hum_rms")["ref"])
        last = s.files(rig=RIG.name)[-1]["recorded_at"]
        assert ref.last_at <= last - 2 * 86400.0
        assert ref.first_at > first.last_at                   # the old files have moved out
        assert ref.median == pytest.approx(0.12, rel=0.1)


# --- the step chart --------------------------------------------------------------------------

STEP_RULES = """
    [settings]
    reference_files = 40
    reference_days = 10
    [[history]]
    name = "hum_jump"
    measure = "hum_rms"
    test = "z"
    side = "up"
    log = true
    z = 4
    [[history]]
    name = "hum_step"
    measure = "hum_rms"
    test = "cusum"
    step = true
    side = "up"
    log = true
    k = 1.25
    arl0_files = 6000
    open_after_files = 1
    [[history]]
    name = "hum_drift"
    measure = "hum_rms"
    test = "cusum"
    side = "up"
    log = true
    k = 0.5
    arl0_files = 6000
    """


def test_a_stored_step_opens_the_step_chart_within_two_files_and_the_jump_rule_stands_down(
        tmp_path):
    # a doubling at 10 % log scatter (6.9 sigma) after a 40-file, 11-day reference: the step
    # chart (k 1.25, h 2.81, one signalling file opens) opens by the 2nd stepped file; the
    # robust-z rule of the same measure stands down and the drift chart is held: one alert
    rules = rules_file(tmp_path, STEP_RULES)
    with Store(tmp_path / "q.sqlite") as s:
        _feed(s, rules, _stable(44))
        assert chart_of(s, "hum_step", "hum_rms")["ref"] is not None
        assert not s.open_alerts(RIG.name)
        step = [2.0 * v for v in _stable(2, 11)]
        opened = []
        for k, v in enumerate(step):
            _feed(s, rules, [v], start=44 + k)
            opened.append([a["rule"] for a in s.open_alerts(RIG.name)])
        assert "hum_step" in opened[0] or "hum_step" in opened[1]
        assert opened[-1] == ["hum_step"]
        assert "stands down" in finding(s, "hum_jump")["limit_text"]
        assert "flagged by hum_step" in finding(s, "hum_drift")["limit_text"]
        body = outbox_rows(s)[-1]["body"]
        assert "hum_rms" in body and "CUSUM" in body


def test_one_alert_per_measure_across_files_the_jump_rule_yields_to_an_open_step_alert(
        tmp_path):
    # a young rig (24 files over 6 days: the step chart charts on its provisional reference,
    # the robust-z rule still works): a rise of 1.35x (robust z 2.9-4.0 against the last good
    # files, never beyond 4 in a row) adds up in the step chart (k 1.25), which opens on its own;
    # then a 2x step that the z rule flags (z 6.6) on each file. The z rule must not open a
    # second alert for the same measure and side while the step chart's is open (it did: two
    # open alerts, hum_step and hum_jump)
    rules = rules_file(tmp_path, STEP_RULES)
    with Store(tmp_path / "q.sqlite") as s:
        _feed(s, rules, _stable(24))
        _feed(s, rules, [0.135] * 5, start=24)
        assert [a["rule"] for a in s.open_alerts(RIG.name)] == ["hum_step"]
        for k in range(3):
            _feed(s, rules, [0.2], start=29 + k)
            assert [a["rule"] for a in s.open_alerts(RIG.name)] == ["hum_step"], k
        jump = finding(s, "hum_jump")
        assert not jump["bad"] and "robust z +6.6" in jump["limit_text"]
        assert "the open hum_step alert covers it" in jump["limit_text"]
        assert finding(s, "hum_step")["bad"]
        assert sum(row["kind"] == "firing" for row in outbox_rows(s)) == 1


def test_only_the_step_chart_runs_on_a_provisional_reference(tmp_path):
    # 24 files over 6 days: the full reference (40 files, 10 days) is still off; the step
    # chart charts against the provisional one (the good files older than 2 days, at least 10
    # over 3 days; its own budget), the drift chart still learns: a few days' scale is too
    # uncertain for its long memory
    rules = rules_file(tmp_path, STEP_RULES)
    with Store(tmp_path / "q.sqlite") as s:
        _feed(s, rules, _stable(9))
        assert "provisional" not in finding(s, "hum_step")["limit_text"]
        _feed(s, rules, _stable(24)[9:], start=9)
        assert "provisional reference" in finding(s, "hum_step")["limit_text"]
        # the 24th file (day 5, 14:00) sees days 0-2 and day 3 before 14:00: 15 files
        assert "from 15 files" in finding(s, "hum_step")["limit_text"]
        assert "learning the reference: 23 of 40 files" in finding(s, "hum_drift")["limit_text"]
        assert "CUSUM" not in finding(s, "hum_drift")["limit_text"]
        assert chart_of(s, "hum_step", "hum_rms")["ref"] is None      # not stored: provisional


def test_readmit_brings_back_flagged_files_within_the_scatter_but_not_a_fault():
    # good files: the logs of 0.1 x exp(N(0, 0.1)); two flagged ones: 1.15x (a false alarm,
    # z ~ 1.4) comes back, 3x (z ~ 11, a fault) stays out (|z| < 3.5: Iglewicz & Hoaglin 1993)
    from qcd.history import readmit
    good = [(float(i), v) for i, v in enumerate(_stable(30))]
    flagged = [(30.5, 0.115), (31.5, 0.3)]
    rows = readmit(sorted(good + flagged), good, log=True)
    assert (30.5, 0.115) in rows and (31.5, 0.3) not in rows
    assert len(rows) == 31 and rows == sorted(rows)
    assert readmit(good, good, log=True) == good


def test_learn_takes_the_first_rows_that_make_files_over_days_whatever_the_path():
    """history.learn: the reference of the first usable rows (finite; positive on a log
    scale) up to the one that makes ``files`` files over ``days`` days (the definition, written
    out here), the same whether every row is usable or some are dropped, lists or tuples."""
    from qcd.history import DAY_S, _widened, reference_of
    rng = np.random.default_rng(5)

    def definition(rows, files, days, log, margin):
        usable = [(t, v) for t, v in rows if math.isfinite(v) and (not log or v > 0)]
        for i, (t, _) in enumerate(usable):
            if i + 1 >= files and t - usable[0][0] >= days * DAY_S:
                return _widened(reference_of(usable[: i + 1], log=log), usable[: i + 1], margin)
        return None
    found = 0
    for case in range(300):
        n = int(rng.integers(0, 60))
        t = np.sort(rng.uniform(0, 20 * DAY_S, n)) + 1.7e9
        v = rng.lognormal(0, 0.3, n) * (1 if case % 3 else rng.choice([1, -1], n))
        rows = [(float(a), float(b)) for a, b in zip(t, v)]
        if case % 5 == 0 and rows:
            rows[int(rng.integers(0, n))] = (rows[0][0], math.nan)
        files, days, log = int(rng.integers(0, 30)), float(rng.uniform(0, 10)), bool(case % 2)
        want = definition(rows, files, days, log, 1.0)
        assert learn(rows, files=files, days=days, log=log, margin=1.0) == want
        assert learn([list(r) for r in rows], files=files, days=days, log=log,
                     margin=1.0) == want
        clean = [r for r in rows if math.isfinite(r[1]) and (not log or r[1] > 0)]
        assert learn(iter(clean), files=files, days=days, log=log, margin=1.0) == want
        found += want is not None
    assert 30 < found < 270          # both outcomes were checked many times
