"""The rig logbook: `qcd note` writes a note, the report lists it and marks it on the trend
plots, `qcd trend` shows it between the values it separates."""
from __future__ import annotations

import re
import time
from datetime import datetime, timezone

import pytest

from qcd.cli import main
from qcd.report import build_report, render_html, render_text, trend_rows, render_trend_text
from qcd.results import ChannelMeasures, FileMeasures, Measure
from qcd.store import Store
from stored import schema_steps

DAY = 86400.0


def _fm(i: int, at: float, noise: float) -> FileMeasures:
    ch = ChannelMeasures(0, "Im", "pA", "A", {"noise_rms": Measure("noise_rms", noise, "pA")})
    return FileMeasures(f"/lab/rig-b/cell{i:02d}.abf", "ok", mode="voltage_clamp",
                        recorded_at=datetime.fromtimestamp(at, tz=timezone.utc).replace(
                            tzinfo=None), mtime=at, size=100, sha256=f"{i:064d}", channels=(ch,))


@pytest.fixture
def lab(tmp_path):
    """A config with rig-b and six days of files: noise 2 pA, 1 pA after a new headstage."""
    cfg = tmp_path / "qcd.toml"
    cfg.write_text('database = "qcd.sqlite"\n[[rig]]\nname = "rig-b"\nfolders = ["d"]\n')
    now = time.time()
    with Store(tmp_path / "qcd.sqlite") as s:
        for i in range(6):
            s.commit_file("rig-b", _fm(i, now - (6 - i) * DAY, 2.0 if i < 3 else 1.0),
                          analysed_at=now)
    return ["--config", str(cfg)], tmp_path / "qcd.sqlite", now


def test_a_note_is_stored_with_when_it_happened(store):
    assert "m004_notes" in schema_steps(store)
    nid = store.add_note("rig-b", "  new bath\n ground ", 1000.0, now=2000.0)
    store.add_note("rig-b", "re-learned after the move", 3000.0, kind="relearn", now=3000.0)
    store.add_note("rig-c", "other rig", 1500.0, now=2000.0)
    got = store.notes("rig-b")
    assert [(n["id"], n["at"], n["text"], n["kind"]) for n in got][0] == \
        (nid, 1000.0, "new bath ground", "note")
    assert [n["kind"] for n in got] == ["note", "relearn"]
    assert [n["text"] for n in store.notes(since=1200.0, until=3000.0)] == ["other rig"]
    assert "rig-c" in store.rigs()


def test_qcd_note_writes_and_lists_the_logbook(lab, capsys):
    c, db, now = lab
    assert main(["note", "rig-b", "replaced", "the", "headstage", "--at", "3d"] + c) == 0
    out = capsys.readouterr().out
    when = datetime.fromtimestamp(now - 3 * DAY, tz=timezone.utc).strftime("%Y-%m-%d %H:%M")
    assert out.startswith(f"noted for rig-b: logbook {when} UTC: replaced the headstage (note 1)")
    assert main(["note", "rig-b"] + c) == 0
    listing = capsys.readouterr().out
    assert "rig-b: 1 note(s) in the last 30 days" in listing
    assert "replaced the headstage" in listing
    assert main(["note", "rig-x", "typo"] + c) == 2
    assert "no rig named 'rig-x' (configured: rig-b)" in capsys.readouterr().err
    assert main(["note", "rig-b", "later", "--at", "2999-01-01"] + c) == 2
    assert "is in the future" in capsys.readouterr().err


def test_the_report_lists_the_note_and_marks_it_on_the_trend_plots(lab, capsys):
    c, db, now = lab
    assert main(["note", "rig-b", "replaced the headstage", "--at", "3d"] + c) == 0
    capsys.readouterr()
    with Store(db) as s:
        report = build_report(s, now, now - 18 * 3600.0)
        with_note = render_html(report)
        (rig,) = report.rigs
        assert [n["text"] for n in rig.notes] == ["replaced the headstage"]
        assert "logbook" in render_text(report) and "replaced the headstage" in render_text(report)
        assert re.search(r"<ul class='notes'><li>logbook [0-9-]+ [0-9:]+ UTC: replaced the "
                         r"headstage</li></ul>", with_note)
        # the trend figure differs only by the note's mark: drawn, not just listed
        from dataclasses import replace
        without = render_html(replace(report, rigs=(replace(rig, notes=()),)))
        img = re.compile(r"<div class='trends'>(.*?)</div>")          # the trend plots
        assert img.search(with_note).group(1) != img.search(without).group(1)


def test_qcd_trend_shows_the_note_between_the_values_it_separates(lab, capsys):
    c, db, now = lab
    assert main(["note", "rig-b", "replaced the headstage", "--at", "3.5d"] + c) == 0
    capsys.readouterr()
    assert main(["trend", "rig-b", "noise_rms"] + c) == 0
    lines = capsys.readouterr().out.splitlines()
    at = next(i for i, line in enumerate(lines) if "replaced the headstage" in line)
    values = [float(x.split()[2]) for x in lines if re.match(r"  \d{4}-\d\d-\d\d ", x)]
    assert values == [2.0, 2.0, 2.0, 1.0, 1.0, 1.0]
    assert lines[at - 1].split()[2] == "2" and lines[at + 1].split()[2] == "1"
    with Store(db) as s:      # the same through the library, notes given explicitly
        rows = trend_rows(s, "rig-b", "noise_rms", channel=None, days=30, now=now)
        assert "replaced" not in render_trend_text("rig-b", "noise_rms", rows)


def test_qcd_trend_refuses_an_unknown_measure_and_a_negative_period(lab, capsys):
    c, db, now = lab
    assert main(["trend", "rig-b", "noise_RMS"] + c) == 2
    err = capsys.readouterr().err
    assert "unknown measure 'noise_RMS'; did you mean noise_rms" in err
    assert main(["trend", "rig-b", "noise_rms", "--days", "-3"] + c) == 2
    assert "expected a number of days above 0, got -3" in capsys.readouterr().err


def test_qcd_relearn_restarts_the_references_and_writes_a_relearn_note(lab, capsys):
    c, db, now = lab
    from qcd import pipeline
    from qcd.config import RigConfig
    from qcd.ruleset import load_rules
    rules = load_rules()
    with Store(db) as s:                  # one more file through the judge: its charts exist
        pipeline.commit(_fm(9, now - 3600.0, 1.0), RigConfig("rig-b", ()), s, rules, now)
        assert ("voltage_clamp", 0, "noise_rms", "noise_drift") in s.charts("rig-b")
    assert main(["relearn", "rig-b", "new", "headstage", "--measure", "noise_rms"] + c) == 0
    out = capsys.readouterr().out
    assert out.startswith("rig-b: re-learning from the next files: noise_rms ch 0")
    with Store(db) as s:
        row = s.charts("rig-b")[("voltage_clamp", 0, "noise_rms", "noise_drift")]
        assert row["ref"] is None and row["start_at"] >= now
        note = s.notes("rig-b")[-1]
        assert note["kind"] == "relearn" and "new headstage" in note["text"]
    assert main(["relearn", "rig-b", "--measure", "noise_rsm"] + c) == 2


def test_qcd_rules_lists_each_history_rule_with_its_false_alarm_rate(lab, capsys):
    c, db, now = lab
    assert main(["rules"] + c) == 0
    out = capsys.readouterr().out
    # 6 files in the last 30 days: 0.2 a day; CUSUM h 7.54 -> 12000 files (qcd.runlength)
    line = next(ln for ln in out.splitlines() if ln.startswith("hum_drift:"))
    assert "one signal per 12,000 files (set for 12000)" in line
    assert "rig-b: 0.2 files a day -> one signal per 60,000 days" in out
    # the step chart: CUSUM k 1.25, h 2.93 -> 8000 files, opening on one file
    line = next(ln for ln in out.splitlines() if ln.startswith("hum_step:"))
    assert "one signal per 8,000 files (set for 8000)" in line and "needs 1 in a row" in line
    # robust z beyond 4, one tail: 1/P(Z > 4) = 31,574 files (normal table)
    assert "hum_jump: hum_rms, robust z beyond 4, side up, log; in control one signal per " \
           "31,574 files" in out
