"""Local time: header times read in the rig's zone, stored as UTC, shown in local time with the
zone named. Expected instants come from the standard library's zoneinfo (the IANA database),
never from qcd.zones itself."""
from __future__ import annotations

import csv
import io
from datetime import datetime, timezone
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from qcd.config import ConfigError, RigConfig, load_config
from qcd.pipeline import process
from qcd.report import build_report, parse_since, render_html, render_text, render_trend_csv
from qcd.ruleset import load_rules
from qcd.synth import write_abf1
from qcd.zones import local_text, localize

LA, TOKYO = "America/Los_Angeles", "Asia/Tokyo"     # UTC-8 (UTC-7 in summer) and UTC+9


def test_local_text_names_the_zone_across_a_dst_change():
    # IANA database: US Pacific summer time ends 2026-11-01 02:00 PDT (-> 01:00 PST).
    before = datetime(2026, 11, 1, 8, 30, tzinfo=timezone.utc).timestamp()   # 01:30 PDT
    after = datetime(2026, 11, 1, 10, 30, tzinfo=timezone.utc).timestamp()   # 02:30 PST
    assert local_text(before, LA) == "2026-11-01 01:30 PDT"
    assert local_text(after, LA) == "2026-11-01 02:30 PST"
    assert local_text(after, TOKYO) == "2026-11-01 19:30 JST"      # Japan: no DST, UTC+9
    # the same wall time a day apart is 25 h apart across the change
    a = localize(datetime(2026, 10, 31, 9, 0), LA).timestamp()
    b = localize(datetime(2026, 11, 1, 9, 0), LA).timestamp()
    assert b - a == 25 * 3600.0


def test_an_unknown_zone_is_refused_naming_the_key(tmp_path):
    p = tmp_path / "qcd.toml"
    p.write_text('timezone = "Mars/Olympus"\n[[rig]]\nname = "a"\nfolders = ["a"]\n')
    with pytest.raises(ConfigError, match="timezone.*Mars/Olympus"):
        load_config(p)


def test_a_rig_zone_overrides_the_lab_zone(tmp_path):
    p = tmp_path / "qcd.toml"
    p.write_text(f'timezone = "{TOKYO}"\n[[rig]]\nname = "a"\nfolders = ["a"]\n'
                 f'[[rig]]\nname = "b"\nfolders = ["b"]\ntimezone = "{LA}"\n')
    cfg = load_config(p)
    assert (cfg.timezone, cfg.rig("a").timezone, cfg.rig("b").timezone) == (TOKYO, TOKYO, LA)


def _write(folder, name, wall: datetime, zone: str):
    """An ABF whose header holds ``wall`` as the acquisition PC in ``zone`` writes it."""
    t = wall.replace(tzinfo=ZoneInfo(zone)).timestamp()          # the true instant (zoneinfo)
    rng = np.random.default_rng(len(name))
    path = folder / name
    write_abf1(path, rng.normal(0.0, 2.0, (1, 20000)), 20000.0, "pA", t, gap_free=True,
               zone=ZoneInfo(zone))
    return path, t


def test_two_rigs_in_two_zones_share_one_report_in_local_time(tmp_path, store):
    west, east = tmp_path / "west", tmp_path / "east"
    rigs = {"west": RigConfig("west", (west,), timezone=LA),
            "east": RigConfig("east", (east,), timezone=TOKYO)}
    rules = load_rules()
    # 17:00 on the evening before DST ends and after it, and the next mornings, at UTC-8/-7
    files = [("west",) + _write(west, "w1.abf", datetime(2026, 10, 31, 17, 0), LA),
             ("west",) + _write(west, "w2.abf", datetime(2026, 11, 2, 17, 0), LA),
             ("east",) + _write(east, "e1.abf", datetime(2026, 11, 2, 9, 0), TOKYO),
             ("east",) + _write(east, "e2.abf", datetime(2026, 11, 3, 9, 0), TOKYO)]
    now = datetime(2026, 11, 3, 8, 0, tzinfo=ZoneInfo(LA)).timestamp()
    for rig, path, t in files:                 # each measured a minute after it was recorded
        process(path, rigs[rig], store, rules, t + 60.0)
    stored = {f["path"]: f["recorded_at"] for r in rigs for f in store.files(rig=r)}
    for _, path, t in files:                 # the header's wall time read in the rig's zone
        assert stored[str(path)] == pytest.approx(t, abs=1e-3)

    # "--since 18h" at 08:00 Pacific reaches back to 14:00 Pacific yesterday: the west rig's
    # 17:00 file (01:00 UTC) is in it; read as UTC it would have been 8 h earlier, outside.
    since = parse_since("18h", now)
    r = build_report(store, now, since, zones={"west": LA, "east": TOKYO}, lab_zone=LA)
    by = {x.rig: x for x in r.rigs}
    assert by["west"].n_files == 1 and by["west"].files[0]["path"].endswith("w2.abf")
    # Tokyo 09:00 on 11-03 is 16:00 Pacific on 11-02: in the period; 11-02 09:00 JST is not
    assert [f["path"][-6:] for f in by["east"].files] == ["e2.abf"]

    # an ISO date without a zone is midnight in the lab's zone (zoneinfo's instant)
    assert parse_since("2026-11-01", now, LA) == \
        datetime(2026, 11, 1, tzinfo=ZoneInfo(LA)).timestamp()

    text = render_text(r)
    assert "2026-11-02 08:00 PST to 2026-11-03 08:00 PST" not in text      # 18 h, not 24
    assert text.splitlines()[0] == ("qcd morning report, 2026-11-02 14:00 PST to "
                                    "2026-11-03 08:00 PST")
    assert f"times in {LA}" in text and f"times in {TOKYO}" in text
    page = render_html(r)
    assert "2026-11-02 17:00 PST" in page            # the west file, Pacific time
    assert "2026-11-03 09:00 JST" in page            # the east file, Tokyo time

    # the whole history across the DST change: each file in the zone time it was written
    r = build_report(store, now, now - 5 * 86400.0, zones={"west": LA, "east": TOKYO},
                     lab_zone=LA)
    page = render_html(r)
    assert "2026-10-31 17:00 PDT" in page and "2026-11-02 17:00 PST" in page

    # trend CSV keeps both: UTC and local with its offset
    rows = [(t, 1.0, "pA", False, i, str(p)) for i, (_, p, t) in enumerate(files[:2])]
    got = list(csv.DictReader(io.StringIO(render_trend_csv(rows, LA))))
    assert got[0]["recorded_at_utc"] == "2026-11-01T00:00:00+00:00"
    assert got[0]["recorded_at_local"] == "2026-10-31T17:00:00-07:00"
    assert got[1]["recorded_at_local"] == "2026-11-02T17:00:00-08:00"


def test_messages_give_times_in_the_rig_zone_with_the_zone_named():
    from qcd import alerts
    from qcd.ruleset import load_rules
    opened = datetime(2026, 11, 3, 0, 0, tzinfo=timezone.utc).timestamp()   # 09:00 in Tokyo
    key = "east|voltage_clamp|0|hum_rms|hum_jump"
    states = {key: {"key": key, "rig": "east", "mode": "voltage_clamp", "channel": 0,
                    "measure": "hum_rms", "rule": "hum_jump", "kind": "drift", "state": "open",
                    "opened_at": opened, "announced": False, "value": 3.0, "unit": "pA"}}
    _, (msg,) = alerts.tick(states, [], opened + 3600.0, load_rules().settings,
                            zones={"east": TOKYO})
    assert "open since 2026-11-03 09:00 JST" in msg.body        # zoneinfo: Tokyo is UTC+9
    _, (msg,) = alerts.tick(states, [], opened + 3600.0, load_rules().settings)
    assert "open since 2026-11-03 00:00 UTC" in msg.body        # a rig of no known zone: UTC


def test_alerts_and_status_show_each_rigs_local_time(store):
    from qcd.report import build_alerts, render_alerts
    from qcd.status import format_status, status
    opened = datetime(2026, 11, 3, 0, 0, tzinfo=timezone.utc).timestamp()
    for rig in ("west", "east"):
        store.commit_alerts([{"key": f"{rig}|voltage_clamp|0|hum_rms|hum_jump", "rig": rig,
                              "mode": "voltage_clamp", "channel": 0, "measure": "hum_rms",
                              "rule": "hum_jump", "state": "open", "opened_at": opened,
                              "resolved_at": None, "announced": True}], now=opened)
    zones = {"west": LA, "east": TOKYO}
    text = render_alerts(build_alerts(store, opened + 60, days=7), zones=zones)
    # zoneinfo: 00:00 UTC is 16:00 the day before in Los Angeles (PST), 09:00 in Tokyo
    assert "2026-11-02 16:00 PST" in text and "2026-11-03 09:00 JST" in text
    text = format_status(status(store, opened + 60, host="h"), opened + 60, zones=zones)
    assert "since 2026-11-02 16:00 PST" in text and "since 2026-11-03 09:00 JST" in text
