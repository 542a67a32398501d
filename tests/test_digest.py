"""The daily report: the real service queues it once a day at the lab's local time through the
outbox, and apprise delivers it to a loopback SMTP server (aiosmtpd) and a JSON webhook with
the HTML page attached. Times are chosen in Asia/Tokyo (UTC+9) and checked against zoneinfo.
"""
from __future__ import annotations

import base64
import re
from datetime import datetime, timezone
from zoneinfo import ZoneInfo

import pytest

from qcd import digest
from qcd.config import load_config
from qcd.judge import Finding
from qcd.notify import Sender
from qcd.results import ChannelMeasures, FileMeasures, Measure
from qcd.ruleset import load_rules
from qcd.store import Store
from qcd.watch import Service

TOKYO = ZoneInfo("Asia/Tokyo")


def _at(day: int, hour: int, minute: int = 0) -> float:
    """Unix seconds of 2026-11-<day> hour:minute in Tokyo (zoneinfo)."""
    return datetime(2026, 11, day, hour, minute, tzinfo=TOKYO).timestamp()


def _fm(rig: str, i: int, t: float, hum: float) -> FileMeasures:
    ch = ChannelMeasures(0, "IN 0", "pA", "A", {"hum_rms": Measure("hum_rms", hum, "pA"),
                                                "noise_rms": Measure("noise_rms", 1.0, "pA")})
    return FileMeasures(f"/lab/{rig}/cell{i:02d}.abf", "ok", mode="voltage_clamp",
                        format="ABF1", fs_hz=20000.0, mtime=t, size=1000,
                        sha256=f"{rig}{i}", channels=(ch,),
                        recorded_at=datetime.fromtimestamp(t, tz=timezone.utc))


def _config(tmp_path, urls, extra="", at="07:30"):
    for r in ("rig-a", "rig-b"):
        (tmp_path / r).mkdir(exist_ok=True)
    p = tmp_path / "qcd.toml"
    p.write_text("notify = [" + ", ".join(f'"{u}"' for u in urls) + "]\n"
                 'timezone = "Asia/Tokyo"\n'
                 f'[digest]\nat = "{at}"\n{extra}\n'
                 '[[rig]]\nname = "rig-a"\nfolders = ["rig-a"]\n'
                 '[[rig]]\nname = "rig-b"\nfolders = ["rig-b"]\n')
    return load_config(p)


def _fill(store: Store, day: int) -> None:
    """rig-a: quiet files; rig-b: an open mains-hum alert on channel 0 (IN 0)."""
    for i in range(3):
        store.commit_file("rig-a", _fm("rig-a", i, _at(day - 1, 10 + i), 0.3),
                          analysed_at=_at(day - 1, 10 + i))
    store.commit_file(
        "rig-b", _fm("rig-b", 9, _at(day - 1, 15), 3.0), analysed_at=_at(day - 1, 15),
        findings=[Finding("rig-b", "voltage_clamp", 0, "hum_rms", "hum_drift", "drift", True,
                          "warning", 3.0, "pA", "z > 4", "check the grounding")],
        alert_states=[{"key": "rig-b|voltage_clamp|0|hum_rms|hum_drift", "rig": "rig-b",
                       "mode": "voltage_clamp", "channel": 0, "measure": "hum_rms",
                       "rule": "hum_drift", "state": "open", "opened_at": _at(day - 1, 15),
                       "resolved_at": None, "announced": True, "kind": "drift",
                       "severity": "warning", "headline": "3.1x its normal",
                       "channel_name": "IN 0"}])


def _service(cfg, store) -> Service:
    return Service(cfg, store, load_rules(), sender=Sender.from_config(cfg), workers=0,
                   poll_s=0.02, progress_tty=False, daily=digest.scheduler(cfg, store))


def _self_contained(page: str, plots: bool = True) -> None:
    assert page.startswith("<!DOCTYPE html>")
    srcs = re.findall(r"""(?:src|href)\s*=\s*['"]([^'"]*)""", page)
    assert all(s.startswith(("data:", "#")) for s in srcs), srcs       # no outside files
    assert any(s.startswith("data:") for s in srcs) == plots            # the plots are inside
    assert "<script" not in page and "<link" not in page


@pytest.mark.slow
def test_one_report_a_day_across_a_restart_and_a_late_one_on_start(tmp_path, smtp_sink,
                                                                   http_sink):
    cfg = _config(tmp_path, [smtp_sink.url, http_sink.url])
    with Store(cfg.database) as store:
        _fill(store, 3)
        svc = _service(cfg, store)
        try:
            svc.start(_at(3, 7, 0))
            svc.step(_at(3, 7, 0))                    # before 07:30 Tokyo: nothing
            assert store.last_outbox(digest.KIND) is None
            svc._last_daily = -1e18
            svc.step(_at(3, 7, 31))                   # on time
            mails = smtp_sink.wait_for(1)
            posts = http_sink.wait_for(1)
            for t in (_at(3, 9), _at(3, 12), _at(3, 23, 59)):   # the same day: no second one
                svc._last_daily = -1e18
                svc.step(t)
        finally:
            svc.close(_at(3, 23, 59))
        # a restart the same day sends nothing more
        svc = _service(cfg, store)
        try:
            svc.start(_at(3, 23, 59))
            svc.step(_at(3, 23, 59))
        finally:
            svc.close(_at(3, 23, 59))
        assert len(smtp_sink.messages) == 1 and len(http_sink.received) == 1
        first = posts[0]
        assert first["title"].startswith("qcd daily report 2026-11-03: 1 rig(s) need attention")
        assert "(late)" not in first["title"]
        lines = first["message"].splitlines()
        assert lines[0] == ("qcd daily report, 2026-11-02 07:31 JST to 2026-11-03 07:31 JST")
        ranked = [x for x in lines if re.match(r"\d+\. ", x)]
        assert ranked[0].startswith("1. rig-b: ALERT - mains hum RMS up 3.1x its normal, "
                                    "channel 0 (IN 0)")
        assert ranked[1].startswith("2. rig-a: ok - ")
        # the webhook got the page as an attachment, self-contained
        att = first["attachments"][0]
        assert att["filename"] == "qcd-report-2026-11-03.html"
        _self_contained(base64.b64decode(att["base64"]).decode("utf-8"))
        # the mail: a text part with the ranked lines and the page attached
        mail = mails[0]
        parts = {p.get_filename(): p for p in mail.walk() if p.get_filename()}
        page = parts["qcd-report-2026-11-03.html"].get_payload(decode=True).decode("utf-8")
        _self_contained(page)
        assert "rig-b" in page and "mains hum RMS up 3.1x its normal" in page

        # the service is down over the next morning's 07:30 and starts at 10:00: a late one
        svc = _service(cfg, store)
        try:
            svc.start(_at(4, 10))
            svc.step(_at(4, 10))
        finally:
            svc.close(_at(4, 10))
        posts = http_sink.wait_for(2)
        assert len(posts) == 2 and len(smtp_sink.wait_for(2)) == 2
        late = posts[1]
        assert late["title"].startswith("qcd daily report 2026-11-04 (late)")
        assert "was due at 2026-11-04 07:30 JST" in late["message"]
        # its period starts where the last one ended
        assert late["message"].splitlines()[0] == ("qcd daily report, 2026-11-03 07:31 JST to "
                                                   "2026-11-04 10:00 JST")


def test_targets_choose_where_the_report_goes_and_alerts_skip_report_only_targets(
        tmp_path, http_sink):
    from sinks import HttpSink
    other = HttpSink().start()
    try:
        cfg = _config(tmp_path, [http_sink.url], extra=f'targets = ["{other.url}"]')
        from qcd.notify import deliver_due
        from qcd.alerts import Message
        with Store(cfg.database) as store:
            _fill(store, 3)
            sender = Sender.from_config(cfg)
            d = digest.queue_due(store, cfg, _at(3, 7, 35))
            assert d is not None and digest.queue_due(store, cfg, _at(3, 9)) is None
            store.commit_alerts((), [Message("k", 1, "firing", 2, "rig-b", "an alert", "x")],
                                now=_at(3, 8))
            deliver_due(store, sender, _at(3, 8))
            got, alerts = other.wait_for(1), http_sink.wait_for(1)
        assert [g["title"] for g in got] == [d.title]            # the report's own target
        assert [a["title"] for a in alerts] == ["an alert"]      # alerts: notify targets only
    finally:
        other.stop()


def test_dry_run_prints_the_ranked_lines_and_writes_the_page(tmp_path, capsys):
    from qcd.cli import main
    cfg = _config(tmp_path, ["json://127.0.0.1:9/never"])
    with Store(cfg.database) as store:
        _fill(store, 3)
    out_html = tmp_path / "today.html"
    assert main(["digest", "--dry-run", "--html", str(out_html), "--config",
                 str(cfg.path)]) == 0
    out = capsys.readouterr().out
    assert re.search(r"^1\. rig-b: ALERT - mains hum RMS up", out, re.M)
    _self_contained(out_html.read_text(encoding="utf-8"), plots=False)   # files a month old
    with Store(cfg.database) as store:                 # a dry run queues nothing
        assert store.last_outbox(digest.KIND) is None


def test_a_bad_digest_time_is_refused_naming_the_key(tmp_path):
    from qcd.errors import ConfigError
    with pytest.raises(ConfigError, match=r"digest\.at.*HH:MM"):
        _config(tmp_path, [], at="7.30")


def test_digest_now_sends_one_by_hand_that_does_not_replace_the_days(tmp_path, http_sink,
                                                                      capsys):
    from qcd.cli import main
    cfg = _config(tmp_path, [http_sink.url])
    with Store(cfg.database) as store:
        _fill(store, 3)
    assert main(["digest", "--now", "--config", str(cfg.path)]) == 0
    (got,) = http_sink.wait_for(1)
    assert got["title"].startswith("qcd daily report ") and got["attachments"]
    assert "sent: 1 message(s)" in capsys.readouterr().out
    with Store(cfg.database) as store:
        row = store.last_outbox(digest.KIND)
        assert row["alert_key"].startswith("daily-report-by-hand|") and row["status"] == "sent"
    assert main(["digest", "--config", str(cfg.path)]) == 2       # --now or --dry-run
