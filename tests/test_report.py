"""The morning report and trend read the store and show exactly its numbers.

The store is filled through Store.commit_file with FileMeasures whose values are the access-
resistance history of docs/methods.md §7 (median 9.5 MOhm, MAD 0.5 MOhm, robust SD 0.7413;
Iglewicz & Hoaglin 1993, robust z), plus one outlier.
"""
from __future__ import annotations

import csv
import io
import json
import re
from datetime import datetime, timezone
from html.parser import HTMLParser

import numpy as np
import pytest

from qcd.judge import Finding
from qcd.results import ChannelMeasures, FileMeasures, Measure, Spectrum
from qcd.report import (build_report, normal_range, parse_since, render_html, render_text,
                        render_trend_csv, render_trend_text, sparkline, trend_rows)

NOW = datetime(2026, 11, 20, 8, 0, tzinfo=timezone.utc).timestamp()
RA = [8.0, 9.0, 10.0, 9.5, 8.5, 11.0, 10.0, 10.5, 9.0, 9.5]   # docs/methods.md §7 check values


def _fm(i: int, t: float, ra: float, hum: float, status: str = "ok") -> FileMeasures:
    f = np.geomspace(1, 5000, 50)
    spec = Spectrum(tuple(f), tuple(1e-4 * (1 + (abs(f - 50) < 2) * 50.0)), "pA")
    ch = ChannelMeasures(0, "Im", "pA", "A", {
        "access_resistance": Measure("access_resistance", ra, "MOhm"),
        "hum_rms": Measure("hum_rms", hum, "pA"),
        "line_hz": Measure("line_hz", 50.0, "Hz"),
        "noise_rms": Measure("noise_rms", 1.0 + 0.01 * i, "pA")}, spectrum=spec)
    if status == "error":
        return FileMeasures(f"/lab/rig-a/2026-11-19_cell{i:02d}.abf", "error",
                            error=f"/lab/rig-a/2026-11-19_cell{i:02d}.abf: header implies more "
                                  "data than the file holds", error_kind="truncated",
                            mtime=t, size=10, sha256=f"e{i}")
    return FileMeasures(f"/lab/rig-a/2026-11-{1 + i:02d}_cell{i:02d}.abf", "ok",
                        mode="voltage_clamp", format="ABF1", fs_hz=20000.0,
                        recorded_at=datetime.fromtimestamp(t, tz=timezone.utc).replace(
                            tzinfo=None), mtime=t, size=1000, sha256=f"s{i}", channels=(ch,))


@pytest.fixture
def store(store):
    """The shared empty store, filled: rig-a's history with one flagged file, rig-b's one file."""
    s = store
    for i, ra in enumerate(RA):
        t = NOW - (12 - i) * 86400.0                   # measured as it was recorded
        s.commit_file("rig-a", _fm(i, t, ra, 0.3), analysed_at=t + 60.0)
    hint = "mains hum rose against the reference: check the grounding of the rig"
    fid = s.commit_file(
        "rig-a", _fm(10, NOW - 3600.0, 18.0, 3.0), analysed_at=NOW,
        findings=[Finding("rig-a", "voltage_clamp", 0, "access_resistance", "access_high",
                          "limit", True, "warning", 18.0, "MOhm", "> 15 MOhm"),
                  Finding("rig-a", "voltage_clamp", 0, "hum_rms", "hum_drift", "drift", True,
                          "warning", 3.0, "pA", "z > 4", hint)],
        alert_states=[{"key": "rig-a|voltage_clamp|0|hum_rms|hum_drift", "rig": "rig-a",
                       "mode": "voltage_clamp", "channel": 0, "measure": "hum_rms",
                       "rule": "hum_drift", "state": "open", "opened_at": NOW - 3600.0,
                       "resolved_at": None, "announced": True}])
    s.commit_file("rig-a", _fm(11, NOW - 1800.0, 0, 0, status="error"), analysed_at=NOW)
    s.commit_file("rig-b", _fm(12, NOW - 7200.0, 9.0, 0.2), analysed_at=NOW)
    s.fid = fid
    return s


def test_normal_range_matches_the_published_robust_z_example():
    med, sd, n = normal_range(RA)
    assert med == 9.5 and n == 10
    assert sd == pytest.approx(0.7413, abs=1e-4)       # 1.4826 x MAD 0.5 (docs/methods.md §7)
    assert (18.0 - med) / sd == pytest.approx(11.47, abs=0.01)


def test_report_numbers_equal_the_store(store):
    r = build_report(store, NOW, parse_since("18h", NOW))
    rig = {x.rig: x for x in r.rigs}["rig-a"]
    files = store.files(rig="rig-a", since=NOW - 18 * 3600.0, or_analysed=True)
    assert rig.n_files == len(files) == 2
    assert rig.n_ok == 1 and rig.n_error == 1 and rig.n_flagged == 1
    lines = {m.measure: m for m in rig.measures}
    series = store.measure_series("rig-a", "access_resistance", channel=0)
    assert lines["access_resistance"].latest == series[-1][1] == 18.0
    assert lines["access_resistance"].median == pytest.approx(np.median([v for _, v, *_ in
                                                                         series[:-1]]))
    assert lines["access_resistance"].median == 9.5
    assert lines["access_resistance"].state == "high"
    assert lines["access_resistance"].unit == "MOhm"
    assert [a["key"] for a in rig.open_alerts] == [a["key"] for a in
                                                  store.open_alerts(rig="rig-a")]
    assert rig.hints and "grounding" in rig.hints[0]
    assert rig.safety_note and "electrician" in rig.safety_note
    assert r.outbox == store.outbox_counts()


def test_terminal_report_fits_100_columns_and_shows_values(store):
    text = render_text(build_report(store, NOW, parse_since("18h", NOW)))
    assert max(len(line) for line in text.splitlines()) <= 100
    assert "rig-a" in text and "rig-b" in text
    assert re.search(r"access_resistance\s+0\s+18\s+9\.5\s+7\.28 \.\. 11\.7\s+MOhm\s+HIGH", text)
    assert "truncated" in text or "header implies" in text
    assert "electrician" in text


def test_json_report_round_trips(store):
    d = json.loads(json.dumps(build_report(store, NOW, NOW - 86400).to_json(), default=str))
    assert {r["rig"] for r in d["rigs"]} == {"rig-a", "rig-b"}


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.imgs, self.refs, self.tags = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        a = dict(attrs)
        if tag == "img":
            self.imgs.append(a.get("src", ""))
        for k in ("src", "href"):
            if k in a and tag != "img":
                self.refs.append(a[k])


def test_html_report_is_one_self_contained_file(store):
    page = render_html(build_report(store, NOW, parse_since("18h", NOW)))
    p = _Collect()
    p.feed(page)
    p.close()
    assert p.imgs, "the report has plots"
    assert all(src.startswith("data:image/png;base64,") for src in p.imgs)
    assert all(ref.startswith("#") for ref in p.refs)  # no links to other files (in-page ok)
    assert "http://" not in page and "https://" not in page
    assert "<script" not in page and "@import" not in page
    assert "electrician" in page


def test_trend_prints_the_stored_series_and_csv_parses(store):
    rows = trend_rows(store, "rig-a", "access_resistance", channel=0, days=30, now=NOW)
    assert [r[1] for r in rows] == RA + [18.0]
    text = render_trend_text("rig-a", "access_resistance", rows)
    assert len(sparkline([r[1] for r in rows])) == len(rows)
    for v in RA:
        assert f"{v:g}" in text
    parsed = list(csv.DictReader(io.StringIO(render_trend_csv(rows))))
    assert [float(r["value"]) for r in parsed] == RA + [18.0]
    assert {r["unit"] for r in parsed} == {"MOhm"}
    assert parsed[-1]["flagged"] == "1"


def test_parse_since_forms():
    assert parse_since("18h", NOW) == NOW - 18 * 3600
    assert parse_since("3d", NOW) == NOW - 3 * 86400
    assert parse_since("2026-11-19", NOW) == datetime(2026, 11, 19, tzinfo=timezone.utc).timestamp()
    from qcd.errors import ConfigError
    with pytest.raises(ConfigError, match="18h"):
        parse_since("yesterday", NOW)


def test_cli_report_and_trend(store, tmp_path, capsys):
    from qcd.cli import main
    cfg = tmp_path / "qcd.toml"
    cfg.write_text(f'database = "{(tmp_path / "qcd.sqlite").as_posix()}"\n'
                   '[[rig]]\nname = "rig-a"\nfolders = ["a"]\n', encoding="utf-8")
    assert main(["trend", "rig-a", "access_resistance", "--csv", "--days", "9999",
                 "--config", str(cfg)]) == 0
    out = capsys.readouterr().out
    assert len(list(csv.DictReader(io.StringIO(out)))) == 11
    assert main(["trend", "nope", "noise_rms", "--config", str(cfg)]) == 2
    html_path = tmp_path / "r.html"
    rc = main(["report", "--since", "9999d", "--html", str(html_path), "--config", str(cfg)])
    assert rc == 1                                      # an open alert and an error file
    assert html_path.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")


def test_active_mute_is_shown_with_its_reason(store):
    store.add_mute("rig-*", "*", NOW - 60, NOW + 7200, "replacing the bath ground", NOW - 60)
    r = build_report(store, NOW, parse_since("18h", NOW))
    text = render_text(r)
    assert "muted until" in text and "replacing the bath ground" in text
    assert "replacing the bath ground" in render_html(r)


def test_sparkline_keeps_a_single_dip_when_it_downsamples():
    v = [10.0] * 200
    v[57], v[150] = 0.1, 20.0
    line = sparkline(v, width=60)
    assert len(line) == 60
    assert line.count("\u2581") == 1 and line.count("\u2588") == 1   # lowest and highest bar


def test_the_period_counts_files_measured_in_it_even_when_recorded_before(store):
    # ten old recordings copied in and measured now (a backlog): stored in the period
    for i in range(10):
        store.commit_file("rig-c", _fm(40 + i, NOW - 30 * 86400.0 + i * 60, 9.0, 0.3),
                          analysed_at=NOW - 600.0)
    r = build_report(store, NOW, parse_since("18h", NOW), ["rig-c"])
    assert r.rigs[0].n_files == 10


def test_high_or_low_is_the_judges_stored_flag_not_the_band(store):
    """One meaning of normal: a row is high/low exactly when the stored file flagged that
    measure; a value beyond the drawn band that no rule flagged stays normal."""
    for i, ra in enumerate(RA):
        t = NOW - (12 - i) * 86400.0
        store.commit_file("rig-d", _fm(60 + i, t, ra, 0.3), analysed_at=t)
    # 30 MOhm is far beyond median + 3 robust SD (9.5 + 2.2) but no finding flags it
    store.commit_file("rig-d", _fm(70, NOW - 60.0, 30.0, 0.3), analysed_at=NOW)
    r = build_report(store, NOW, parse_since("18h", NOW))
    for rig in r.rigs:
        for m in rig.measures:
            rows = store.measure_series(rig.rig, m.measure, channel=m.channel,
                                        since=NOW - 30 * 86400.0)
            assert (m.state in ("high", "low")) == bool(rows[-1][3]), (rig.rig, m)
    d = {m.measure: m for m in {x.rig: x for x in r.rigs}["rig-d"].measures}
    assert d["access_resistance"].latest > d["access_resistance"].high
    assert d["access_resistance"].state == "normal"
    a = {m.measure: m for m in {x.rig: x for x in r.rigs}["rig-a"].measures}
    assert a["access_resistance"].state == "high"          # flagged by access_high


@pytest.mark.parametrize("hours", [3, 20, 50, 24 * 9, 24 * 30, 24 * 75])
def test_the_date_axis_never_repeats_a_label(hours):
    # matplotlib draws the ticks; every label it shows must differ from the others
    from zoneinfo import ZoneInfo

    from qcd.html import date_axis, pyplot
    plt = pyplot()
    zone = ZoneInfo("America/Los_Angeles")
    t0 = datetime(2026, 10, 30, 5, 0, tzinfo=zone)     # spans the 2026-11-01 DST change
    fig, ax = plt.subplots(figsize=(5.7, 2.7), dpi=96)
    try:
        ts = [datetime.fromtimestamp(t0.timestamp() + h * 3600.0 * hours / 40, tz=zone)
              for h in range(41)]
        ax.plot(ts, np.arange(41.0))
        date_axis(ax, zone)
        fig.canvas.draw()
        labels = [x.get_text() for x in ax.get_xticklabels() if x.get_text()]
        assert len(labels) >= 3 and len(set(labels)) == len(labels), labels
    finally:
        plt.close(fig)


@pytest.mark.slow
def test_the_page_fits_a_400_px_phone_screen(store, tmp_path):
    """Laid out by a real browser (headless Chromium, skipped where none is installed): at a
    phone's 400 px no element of the page reaches past the screen's right edge."""
    import shutil
    import subprocess
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("headless Chromium not installed (apt-get install chromium)")
    page = render_html(build_report(store, NOW, parse_since("18h", NOW)))
    probe = ("<style>body{width:400px}</style><script>var r=0;"
             "document.querySelectorAll('main *').forEach(e=>{var b=e.getBoundingClientRect();"
             "if(b.width>0)r=Math.max(r,b.right)});document.title='R'+Math.round(r)</script>")
    path = tmp_path / "report.html"
    path.write_text(page.replace("</body>", probe + "</body>"), encoding="utf-8")
    # the narrowest window headless Chromium lays out is 500 px: the page's phone styles
    # (max-width 600 px) apply, and the body is held to 400 px
    out = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu",
                          "--window-size=400,2000", "--dump-dom", path.as_uri()],
                         capture_output=True, text=True, timeout=60).stdout
    right = int(re.search(r"<title>R(\d+)</title>", out).group(1))
    assert 300 < right <= 400
