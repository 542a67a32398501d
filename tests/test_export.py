"""`qcd export`: per file and channel, the measures and a verdict by the alert rules (the same
qcd.judge), grouped by cell; the demo lab's files are checked in test_demo.py."""
from __future__ import annotations

import csv
import io
import json
import time
from datetime import datetime, timezone

import pytest

from conftest import abf
from qcd.cli import main
from qcd.config import RigConfig
from qcd.export import cell_of, verdicts
from qcd.pipeline import process
from qcd.results import ChannelMeasures, FileMeasures, Measure
from qcd.ruleset import load_rules
from qcd.store import Store

DAY = 86400.0


def _fm(name: str, at: float, access_mohm: float) -> FileMeasures:
    ch = ChannelMeasures(0, "Im", "pA", "A", {
        "access_resistance": Measure("access_resistance", access_mohm, "MOhm"),
        "noise_rms": Measure("noise_rms", 1.5, "pA")})
    return FileMeasures(f"/lab/rig-b/{name}", "ok", mode="voltage_clamp",
                        recorded_at=datetime.fromtimestamp(at, tz=timezone.utc).replace(
                            tzinfo=None), mtime=at, size=100, sha256=name.ljust(64, "0"),
                        channels=(ch,))


@pytest.fixture
def lab(tmp_path):
    """rig-b, whose files name their cell (date_cell_file): cell c1 has one file with access
    31 MOhm (above the default 25 MOhm), cell c2 stays at 12-22 MOhm; one file cut short."""
    cfg = tmp_path / "qcd.toml"
    cfg.write_text('database = "qcd.sqlite"\n[[rig]]\nname = "rig-b"\nfolders = ["d"]\n'
                   "cell_pattern = '^(?P<cell>\\d{8}_c\\d+)_'\n")
    now = time.time()
    files = [("20261103_c1_0001.abf", 12.0), ("20261103_c1_0002.abf", 31.0),
             ("20261103_c2_0001.abf", 14.0), ("20261103_c2_0002.abf", 22.0)]
    with Store(tmp_path / "qcd.sqlite") as s:
        for i, (name, ra) in enumerate(files):
            s.commit_file("rig-b", _fm(name, now - (5 - i) * DAY, ra), analysed_at=now)
        s.commit_file("rig-b", FileMeasures("/lab/rig-b/20261103_c3_0001.abf", "error",
                                            error="/lab/rig-b/20261103_c3_0001.abf: header "
                                                  "implies data beyond the end of the file",
                                            error_kind="truncated", mtime=now - DAY, size=10,
                                            sha256="e" * 64), analysed_at=now)
    return ["--config", str(cfg)], tmp_path


def test_cell_of_takes_the_named_group_the_only_group_or_the_match():
    assert cell_of(r"^(?P<cell>\d{8}_c\d+)_", "/x/20261103_c12_0004.abf") == "20261103_c12"
    assert cell_of(r"_(c\d+)_", "20261103_c7_0001.abf") == "c7"
    assert cell_of(r"c\d+", "20261103_c7_0001.abf") == "c7"
    assert cell_of(r"cell\d+", "20261103_c7_0001.abf") == "" and cell_of(None, "c1.abf") == ""


def test_export_csv_gives_verdicts_reasons_and_cell_verdicts(lab, capsys):
    c, tmp = lab
    out = tmp / "rig-b.csv"
    assert main(["export", "--csv", str(out)] + c) == 0
    said = capsys.readouterr().out
    assert said.startswith(f"wrote {out}: 5 files (5 rows) of 1 rig: 3 files pass, 2 fail; "
                           f"3 cells: 1 pass, 2 fail")
    rows = {r["file"]: r for r in csv.DictReader(io.StringIO(out.read_text()))}
    bad = rows["20261103_c1_0002.abf"]
    assert bad["verdict"] == "fail" and bad["cell"] == "20261103_c1"
    assert bad["reasons"] == "access_high: access_resistance 31 MOhm (limit above 25 MOhm)"
    assert float(bad["access_resistance"]) == 31.0 and bad["unit"] == "pA"
    assert rows["20261103_c1_0001.abf"]["verdict"] == "pass"
    assert rows["20261103_c1_0001.abf"]["cell_verdict"] == "fail"       # its cell has a bad file
    assert {rows[f]["cell_verdict"] for f in ("20261103_c2_0001.abf", "20261103_c2_0002.abf")} \
        == {"pass"}
    cut = rows["20261103_c3_0001.abf"]
    assert cut["verdict"] == "fail" and cut["channel"] == "" and cut["status"] == "error"
    assert cut["reasons"].startswith("not measured (truncated): ")


def test_inclusion_criteria_are_a_rule_file_of_limits(lab, capsys):
    c, tmp = lab
    strict = tmp / "inclusion.toml"
    strict.write_text('[[limit]]\nname = "include_access"\nmeasure = "access_resistance"\n'
                      'above = "20 MOhm"\n')
    assert main(["export", "--rules", str(strict)] + c) == 0
    docs = {d["file"]: d for d in map(json.loads, capsys.readouterr().out.splitlines())}
    assert docs["20261103_c2_0002.abf"]["verdict"] == "fail"            # 22 MOhm > 20 MOhm
    assert docs["20261103_c2_0002.abf"]["reasons"] == [
        "include_access: access_resistance 22 MOhm (limit above 20 MOhm)"]
    assert docs["20261103_c2_0002.abf"]["measures"]["access_resistance"] == \
        {"value": 22.0, "unit": "MOhm"}
    assert docs["20261103_c2_0001.abf"]["verdict"] == "pass"            # 14 MOhm
    strict.write_text('[[history]]\nname = "x"\nmeasure = "noise_rms"\n')
    assert main(["export", "--rules", str(strict)] + c) == 2
    assert "give only [[limit]] tables here" in capsys.readouterr().err
    assert main(["export", "--rig", "rig-z"] + c) == 2
    assert "no files stored for rig 'rig-z' (known: rig-b)" in capsys.readouterr().err


def test_a_file_level_finding_fails_only_the_channels_it_names(store):
    # vc_step_abf1.abf: channel 1 is a flat 11.6 nA offset whose spectrum is still flat near
    # Nyquist (see test_channels.py); channel 0 records the cell
    rules = load_rules()
    process(abf("vc_step_abf1.abf"), RigConfig("rig-a", ()), store, rules, time.time())
    rows = {r.channel: r for r in verdicts(store, rules, now=time.time())}
    assert rows[0].verdict == "pass" and rows[0].reasons == ()
    assert rows[1].verdict == "fail"
    assert [x.split(":")[0] for x in rows[1].reasons] == ["holding_current", "alias_risk"]
    assert "alias_risk: alias_risk is true on channel 1 (Current 1)" in rows[1].reasons
