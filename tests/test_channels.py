"""Which channels a rig watches, the names they are shown under, and acquisition findings made
once per file: checked on the real recordings against what pyabf reads from their headers."""
from __future__ import annotations

import numpy as np
import pyabf
import pytest

from conftest import abf
from qcd.config import RigConfig
from qcd.analyze import analyze_path
from qcd.pipeline import commit, process, watched_channels
from qcd.report import build_report, render_text
from qcd.ruleset import load_rules
from stored import outbox_rows

NOW = 1_790_000_000.0
ELECTRICAL = {"pA", "nA", "A", "mV", "V", "uV"}     # current and voltage units (SI; common practice)


@pytest.fixture(scope="module")
def rules():
    return load_rules()


def _file(store, rig):
    (f,) = store.files(rig=rig)
    return f, store.findings(f["id"])


def test_the_16_channel_file_gives_one_aliasing_finding_and_none_on_its_temperature_channel(
        store, rules):
    path = abf("gapfree_16_channels.abf")
    units = pyabf.ABF(str(path), loadData=False).adcUnits       # the reference reader's units
    electrical = [i for i, u in enumerate(units) if u in ELECTRICAL]
    other = [i for i, u in enumerate(units) if u not in ELECTRICAL]
    assert len(units) == 16 and other == [15]                    # 'C': a temperature channel
    rig = RigConfig("rig-16", ())
    fm = process(path, rig, store, rules, NOW)
    assert [c.index for c in fm.channels] == electrical
    f, findings = _file(store, "rig-16")
    assert any("channel 15 (Tmp, C) not watched" in n for n in f["notes"])
    alias = [x for x in findings if x["rule"] == "alias_risk"]
    assert len(alias) == 1 and alias[0]["bad"] and alias[0]["channel"] == -1
    assert "channels 0-14 (15, all watched)" in alias[0]["limit_text"]
    assert not [x for x in findings if x["channel"] in other]
    assert list(store.channel_names("rig-16")) == electrical
    opened = [a for a in store.open_alerts("rig-16")]
    assert [a["rule"] for a in opened] == ["alias_risk"]         # one alert, not 15 (or 16)
    (msg,) = outbox_rows(store)
    assert msg["body"].count("OPEN") == 1 and "channels 0-14" in msg["body"]


def test_holding_current_ignores_a_flat_offset_channel_the_rig_does_not_watch(store, rules):
    path = abf("vc_step_abf1.abf")
    ref = pyabf.ABF(str(path))
    ref.setSweep(0, channel=1)
    offset = float(np.mean(ref.sweepY))                          # pyabf's reading: ~11.6 nA
    assert abs(offset) > 10_000 and float(np.std(ref.sweepY)) < 0.01 * abs(offset)
    # measured once; each rig then keeps its channels (pipeline.measure = watched_channels of
    # analyze's result) and commits as the service does
    measured = analyze_path(path, digest=True)

    def run(rig: RigConfig) -> None:
        commit(watched_channels(measured, rig), rig, store, rules, NOW)
    # watching every current channel, the offset channel breaks the 200 pA holding limit ...
    run(RigConfig("rig-all", ()))
    _, findings = _file(store, "rig-all")
    bad = [(x["channel"], x["rule"]) for x in findings if x["bad"]]
    assert (1, "holding_current") in bad
    hold = next(x for x in findings if x["rule"] == "holding_current" and x["channel"] == 1)
    assert hold["value"] == pytest.approx(offset, rel=0.01)
    # ... and a rig that watches channel 0 only never judges it
    run(RigConfig("rig-0", (), channels=(0,)))
    f, findings = _file(store, "rig-0")
    assert not [x for x in findings if x["rule"] == "holding_current" and x["bad"]]
    assert {x["channel"] for x in findings} <= {-1, 0}
    assert any("channel 1 (Current 1, pA) not watched: not in the rig's channels" in n
               for n in f["notes"])
    assert [a["rule"] for a in store.open_alerts("rig-0")] == []


def test_a_channel_is_shown_under_the_rigs_name_for_it(store, rules):
    path = abf("vc_recorded_command_3ch.abf")
    names = pyabf.ABF(str(path), loadData=False).adcNames
    assert names[0] == "Ipatch"
    rig = RigConfig("rig-n", (), channels=("Ipatch", 1), channel_names=(("Ipatch", "cell 1"),
                                                                        (1, "command")))
    process(path, rig, store, rules, NOW)
    assert store.channel_names("rig-n") == {0: "cell 1", 1: "command"}
    (msg,) = outbox_rows(store)
    assert "access_change_pct channel 0 (cell 1)" in msg["title"] + msg["body"]
    at = store.files(rig="rig-n")[0]["recorded_at"]            # the header's time
    text = render_text(build_report(store, at + 60, at - 3600))
    assert "channels: 0 cell 1, 1 command" in text


def _clipping_file(fractions):
    from qcd.results import ChannelMeasures, FileMeasures, Measure
    chans = tuple(ChannelMeasures(i, f"IN {i}", "pA", "A",
                                  {"clipping_fraction": Measure("clipping_fraction", v, "")})
                  for i, v in enumerate(fractions))
    return FileMeasures(path="/d/f.abf", status="ok", mode="voltage_clamp", channels=chans)


def test_clipping_is_one_rig_level_finding_per_file_naming_the_clipped_channels(rules):
    from qcd.judge import judge
    # default limit: more than 0.1 % of samples at the rails (rules/default.toml; common practice)
    (f,) = [x for x in judge(_clipping_file([0.0, 0.02, 0.0005, 0.004]), "r",
                             lambda *a, **k: [], rules, 0) if x.rule == "clipping"]
    assert f.bad and f.kind == "rig" and f.channel == -1 and f.channels == (1, 3)
    assert f.value == 0.02                                       # the worst channel's share
    assert f.limit_text == "above 0.001 on channels 1 (IN 1), 3 (IN 3)"
    (ok,) = [x for x in judge(_clipping_file([0.0, 0.0, 0.0]), "r", lambda *a, **k: [], rules, 0)
             if x.rule == "clipping"]
    assert not ok.bad and ok.clear and ok.channels == ()
    # one channel just under the limit: not bad, and not clear (inside the 10 % clear margin)
    (near,) = [x for x in judge(_clipping_file([0.0, 0.00095]), "r", lambda *a, **k: [], rules, 0)
               if x.rule == "clipping"]
    assert not near.bad and not near.clear


def test_channel_list_reads_as_text():
    from qcd.judge import channel_list
    assert channel_list([(1, "Current 1")]) == "channel 1 (Current 1)"
    assert channel_list([(3, "I2"), (0, "V1")]) == "channels 0 (V1), 3 (I2)"
    assert channel_list([(i, "") for i in (0, 1, 2, 3, 4, 9)], 16) == "channels 0-4, 9 (6 of 16)"
