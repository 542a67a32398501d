"""End to end: real ABF files -> measures -> SQLite -> judge -> alerts -> outbox -> apprise ->
a real HTTP or SMTP server on 127.0.0.1.

The recordings are written with pyabf's own writer from analytic signals: Johnson-Nyquist
current noise of a 500 MOhm resistor, sigma = sqrt(4kTB/R) (Johnson 1928; Nyquist 1928), through
a 4-pole Bessel low-pass at 2 kHz (scipy.signal.bessel), plus a small 50 Hz line. The resistor
varies by 10 % between files (lognormal), as seals and pipettes do, so the rig's normal has a
realistic spread. Times are chosen and passed in as ``now``; file times come from the mtime.
"""
from __future__ import annotations

import re
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import threading
from pathlib import Path

import numpy as np
import pyabf.abfWriter
import pytest
from scipy.signal import bessel, sosfilt

from qcd.cli import main
from qcd.config import RigConfig
from qcd.ruleset import load_rules
from qcd.notify import Sender, deliver_due
from qcd.pipeline import process
from qcd.store import Store

import stored
from sinks import HttpSink

FS = 10_000.0
SECONDS = 5.0
K_B, TEMP, R_OHM = 1.380649e-23, 295.0, 500e6
SIGMA_PA = np.sqrt(4 * K_B * TEMP * (FS / 2) / R_OHM) / 1e-12     # white noise over fs/2
HUM_PA = 0.015                   # a small 50 Hz line, RMS
T0 = 1_780_000_000.0
STEP = 1800.0                    # a file every 30 min
ROOT = Path(__file__).resolve().parent.parent


def write_recording(path: Path, seed: int, hum_pa: float, at: float) -> Path:
    rng = np.random.default_rng(seed)
    n = int(FS * SECONDS)
    t = np.arange(n) / FS
    sos = bessel(4, 2000.0, fs=FS, output="sos", norm="mag")
    sigma = SIGMA_PA * np.exp(rng.normal(0.0, 0.05))       # R varies ~10 % between files
    x = sosfilt(sos, rng.normal(0.0, sigma, n))
    x += hum_pa * np.sqrt(2) * np.sin(2 * np.pi * 50.0 * t + rng.uniform(0, 2 * np.pi))
    pyabf.abfWriter.writeABF1(x.reshape(1, -1), str(path), FS, "pA")
    os.utime(path, (at, at))
    return path


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    """30 normal files, 2 with 5x hum, 4 normal ones after: (paths, times)."""
    folder = tmp_path_factory.mktemp("rig-e2e")
    plan = [HUM_PA] * 30 + [5 * HUM_PA] * 2 + [HUM_PA] * 4
    files, times = [], []
    for i, hum in enumerate(plan):
        at = T0 + i * STEP
        files.append(write_recording(folder / f"cell{i:03d}.abf", i, hum, at))
        times.append(at + 60.0)                             # measured a minute after writing
    return folder, files, times


@pytest.fixture
def rig(lab):
    return RigConfig(name="rig-e2e", folders=(lab[0],), mains_hz=50.0)


@pytest.fixture(scope="module")
def rules():
    return load_rules()


def _run(files, times, rig, store, rules, sender=None):
    out = []
    for path, now in zip(files, times):
        fm = process(path, rig, store, rules, now, sender=sender)
        assert fm.status == "ok", fm.error                  # 'internal' would be a qcd bug
        out.append(fm)
    return out


def test_normal_rig_sends_nothing_then_hum_opens_one_alert_and_resolves(lab, rig, store, rules,
                                                                        http_sink):
    _, files, times = lab
    sender = Sender([http_sink.url])
    _run(files[:30], times[:30], rig, store, rules, sender)
    assert http_sink.received == [] and store.open_alerts("rig-e2e") == []
    assert store.outbox_counts() == {"pending": 0, "sent": 0, "stuck": 0}

    _run(files[30:31], times[30:31], rig, store, rules, sender)       # first bad file: suspect
    assert http_sink.received == []
    _run(files[31:32], times[31:32], rig, store, rules, sender)       # second: opens
    (msg,) = http_sink.wait_for(1)
    assert "rig-e2e" in msg["title"] and "hum_rms" in msg["title"]
    assert "rig-e2e" in msg["message"] and "cell031.abf" in msg["message"]
    assert re.search(r"value: [0-9.]+ [fpn]A; normal [0-9.]+-[0-9.]+ [fpn]A", msg["message"])
    assert "grounding" in msg["message"] and "electrician" in msg["message"]
    (alert,) = store.open_alerts("rig-e2e")
    assert alert["measure"] == "hum_rms" and alert["rule"] == "hum_jump"

    _run(files[32:36], times[32:36], rig, store, rules, sender)       # normal again
    got = http_sink.wait_for(2)
    assert len(got) == 2 and "resolved" in got[1]["title"] and got[1]["type"] == "success"
    assert store.open_alerts("rig-e2e") == []
    assert store.outbox_counts() == {"pending": 0, "sent": 2, "stuck": 0}
    # the hum files are flagged and stay out of the rig's baseline
    hist = store.history("rig-e2e", "voltage_clamp", 0, "hum_rms", limit=100, days=30,
                         before=times[-1] + 1)
    assert len(hist) == 34 and max(v for _, v in hist) < 3 * HUM_PA


def test_target_down_then_up_every_message_arrives_exactly_once(lab, rig, store, rules,
                                                               apprise_pools):
    _, files, times = lab
    sink = HttpSink()                                   # down: nothing listens on its port
    try:
        sender = Sender([sink.url])
        _run(files, times, rig, store, rules, sender)   # opens and resolves while down
        assert store.outbox_counts()["pending"] == 2
        now = times[-1]
        for _ in range(3):
            now += 3600.0
            deliver_due(store, sender, now)
        assert store.outbox_counts()["pending"] == 2
        sink.start()
        for _ in range(4):
            now += 3600.0
            deliver_due(store, sender, now)
        got = sink.wait_for(2)
        assert [("resolved" in g["title"]) for g in got] == [False, True]
        assert len(sink.received) == 2
        assert store.outbox_counts() == {"pending": 0, "sent": 2, "stuck": 0}
    finally:
        sink.stop()


def test_hum_alert_arrives_as_one_mail(lab, rig, store, rules, smtp_sink):
    _, files, times = lab
    sender = Sender([smtp_sink.url])
    _run(files[18:32], times[18:32], rig, store, rules, sender)   # 12 to learn, 2 with hum
    (mail,) = smtp_sink.wait_for(1)
    assert "rig-e2e" in mail["Subject"] and "hum_rms" in mail["Subject"]


_CHILD = textwrap.dedent("""
    import sys
    from pathlib import Path
    from qcd.config import RigConfig
    from qcd.ruleset import load_rules
    from qcd.pipeline import process
    from qcd.store import Store
    db, folder, t0, step = sys.argv[1], Path(sys.argv[2]), float(sys.argv[3]), float(sys.argv[4])
    files = sorted(folder.glob("cell*.abf"))[:32]
    rig = RigConfig(name="rig-e2e", folders=(folder,), mains_hz=50.0)
    store, rules = Store(db), load_rules()
    for i, path in enumerate(files):
        process(path, rig, store, rules, t0 + i * step + 60.0)   # no sender: queued only
    print("queued", flush=True)
    sys.stdin.read()                                          # killed here, before any send
""")


def test_kill_between_outbox_write_and_send_sends_on_next_start(lab, tmp_path, http_sink):
    folder, _, times = lab
    db = tmp_path / "qcd.sqlite"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    child = subprocess.Popen([sys.executable, "-c", _CHILD, str(db), str(folder), str(T0),
                              str(STEP)], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                             env=env, text=True)
    try:
        assert child.stdout.readline().strip() == "queued"
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=10)
        child.stdin.close()
        child.stdout.close()
    assert child.returncode == -signal.SIGKILL
    with Store(db) as store:                                  # the next start
        assert store.outbox_counts()["pending"] == 1
        deliver_due(store, Sender([http_sink.url]), times[31] + 120.0)
        (msg,) = http_sink.wait_for(1)
        assert "hum_rms" in msg["title"]
        deliver_due(store, Sender([http_sink.url]), times[31] + 7200.0)
        assert len(http_sink.received) == 1 and store.outbox_counts()["sent"] == 1


def test_second_reader_reads_during_writes_without_errors(lab, rig, tmp_path, rules):
    _, files, times = lab
    db = tmp_path / "qcd.sqlite"
    store = Store(db)
    stop, errors, counts = threading.Event(), [], []

    def reader():
        con = sqlite3.connect(db, timeout=5)
        try:
            while True:
                last = stop.is_set()             # one more read after the writer is done
                try:
                    counts.append(con.execute("SELECT count(*) FROM files").fetchone()[0])
                    con.execute("SELECT * FROM outbox").fetchall()
                except sqlite3.Error as e:
                    errors.append(repr(e))
                if last:
                    break
        finally:
            con.close()
    t = threading.Thread(target=reader, name="second-reader")
    t.start()
    try:
        _run(files[:16], times[:16], rig, store, rules)
    finally:
        stop.set()
        t.join(timeout=10)
        store.close()
    assert errors == []
    assert counts and counts == sorted(counts) and counts[-1] == 16


def test_unreadable_file_is_stored_as_error_and_reported(lab, rig, store, rules, tmp_path,
                                                         http_sink):
    bad = tmp_path / "broken.abf"
    bad.write_bytes(b"ABF " + b"\x00" * 100)
    fm = process(bad, rig, store, rules, T0, sender=Sender([http_sink.url]))
    assert fm.status == "error" and fm.error_kind not in (None, "internal")
    (msg,) = http_sink.wait_for(1)
    assert "rig-e2e" in msg["title"] and "broken.abf" in msg["message"]
    (row,) = store.files("rig-e2e")
    assert row["status"] == "error"


@pytest.mark.slow
def test_scan_store_command_runs_the_whole_chain(lab, tmp_path, http_sink, capsys):
    folder, files, _ = lab
    scan_dir = tmp_path / "scan"
    scan_dir.mkdir()
    for src in files[16:32]:                    # 14 normal, then 2 with hum
        dst = scan_dir / src.name
        dst.write_bytes(src.read_bytes())
        os.utime(dst, (src.stat().st_mtime,) * 2)
    cfg = tmp_path / "qcd.toml"
    cfg.write_text(textwrap.dedent(f"""
        database = "qcd.sqlite"
        notify = ["{http_sink.url}"]
        [[rig]]
        name = "rig-e2e"
        folders = ["{scan_dir}"]
        mains_hz = 50
    """))
    code = main(["scan", "--store", "--rig", "rig-e2e", "--config", str(cfg), "--workers", "2",
                 str(scan_dir)])
    out = capsys.readouterr().out
    assert code == 0, out
    assert out.count("stored  ") == 16
    # measured in two processes, committed in recording order (here the files' mtimes)
    stored = [Path(line.split()[1]).name for line in out.splitlines()
              if line.startswith("stored  ")]
    assert stored == [f.name for f in files[16:32]]
    assert "alert opened: hum_rms" in out and "1 sent" in out
    (msg,) = http_sink.wait_for(1)
    assert "hum_rms" in msg["title"]


def test_backlog_gives_one_digest_instead_of_a_message_per_file(lab, rig, store, rules,
                                                                http_sink):
    from qcd.pipeline import flush_digest
    _, files, times = lab
    for path, now in zip(files[:32], times[:32]):
        assert process(path, rig, store, rules, now, batch=True).status == "ok"
    assert store.outbox_counts()["pending"] == 0               # nothing per file
    msg = flush_digest(store, rules, times[31] + 10.0, Sender([http_sink.url]))
    assert msg is not None and msg.kind == "digest"
    (got,) = http_sink.wait_for(1)
    assert "digest" in got["title"] and "1 open" in got["title"] and "hum_rms" in got["message"]
    assert flush_digest(store, rules, times[31] + 20.0) is None  # announced once


def test_mute_mutes_the_alert_and_its_end_sends_one_message(lab, rig, store, rules,
                                                               http_sink):
    from qcd.pipeline import tick
    _, files, times = lab
    sender = Sender([http_sink.url])
    end = times[31] + 3600.0
    store.add_mute("rig-e2e", "hum_*", times[0], end, "replacing the headstage", times[0])
    _run(files[:32], times[:32], rig, store, rules, sender)
    assert http_sink.received == [] and len(store.open_alerts("rig-e2e")) == 1
    assert tick(store, rules, end - 1.0, sender) == []
    (m,) = tick(store, rules, end + 1.0, sender)
    (got,) = http_sink.wait_for(1)
    assert "hum_rms" in got["title"] and "held back" in got["message"]
    assert tick(store, rules, end + 600.0, sender) == []


def test_a_bug_while_judging_becomes_an_internal_error_row_and_the_caller_carries_on(
        lab, rig, store, caplog):
    from qcd.ruleset import Rules
    _, files, times = lab
    broken = Rules(settings=None)          # not a valid Rules: judging fails inside qcd
    fm = process(files[0], rig, store, broken, times[0])
    assert fm.status == "error" and fm.error_kind == "internal"
    assert "internal error" in fm.error and "judging" in caplog.text
    (row,) = store.files("rig-e2e")
    assert row["status"] == "error" and row["error_kind"] == "internal"


def test_a_bug_while_measuring_becomes_an_internal_error_row_with_the_file_facts(
        lab, store, rules, caplog):
    import hashlib
    folder, files, times = lab
    broken = RigConfig(name="rig-e2e", folders=(folder,), mains_hz="fifty")  # measuring fails
    fm = process(files[0], broken, store, rules, times[0])
    assert fm.status == "error" and fm.error_kind == "internal"
    assert "internal error while measuring" in fm.error and "Traceback" in caplog.text
    st = files[0].stat()                    # stored with its size, mtime and content hash
    assert (fm.size, fm.mtime) == (st.st_size, st.st_mtime)
    assert fm.sha256 == hashlib.sha256(files[0].read_bytes()).hexdigest()
    (row,) = store.files("rig-e2e")
    assert row["status"] == "error" and row["error_kind"] == "internal"


def test_until_resolved_mute_ends_when_its_alert_resolves(lab, rig, store, rules, http_sink):
    _, files, times = lab
    sender = Sender([http_sink.url])
    _run(files[:30], times[:30], rig, store, rules, sender)
    sid = store.add_mute("rig-e2e", "*", times[29], None, "new ground lead on order",
                            times[29])
    _run(files[30:32], times[30:32], rig, store, rules, sender)      # opens, muted
    assert [s.id for s in store.active_mutes(times[31])] == [sid]
    _run(files[32:36], times[32:36], rig, store, rules, sender)      # resolves
    assert store.active_mutes(times[35] + 1) == []
    assert http_sink.received == []                 # never announced, so no resolved message


def test_scan_store_says_a_new_rig_is_learning(lab, tmp_path, capsys):
    _, files, _ = lab
    cfg = tmp_path / "qcd.toml"
    cfg.write_text(f'database = "q.sqlite"\n[[rig]]\nname = "rig-new"\nfolders = ["{tmp_path}"]\n'
                   f'mains_hz = 50\n')
    code = main(["scan", "--store", "--rig", "rig-new", "--config", str(cfg),
                 *map(str, files[:4])])
    out = capsys.readouterr().out
    assert code == 0, out
    assert "learning (voltage_clamp): 4 of 10 files" in out
    assert "(no notification targets)" in out


@pytest.mark.slow
def test_a_broadband_fault_longer_than_the_history_keeps_its_hint_and_its_hum(tmp_path, store,
                                                                             rules):
    # a whole-cell rig as the demo lab models it (qcd.synth: Ra 10 MOhm, Rm 450 MOhm, Cm 30 pF,
    # a -5 mV declared test step, 10 sweeps at 10 kHz behind a 2 kHz 4-pole Bessel, mains
    # 50 Hz declared, hum 0.7/0.2/0.12 pA peak at 50/100/150 Hz: 0.52 pA RMS, analytic):
    # 14 normal files, then a headstage fault - broadband noise 1.2 -> 4.2 pA (3.5x), the
    # hum untouched - for 36 files, more than history_files (30), one every 8 hours, so the
    # alerts remind about daily. Every message and the morning report name the broadband
    # source (headstage) and never the grounding: the hint compares with files that carry no
    # flag, so the fault never becomes the normal of the bands; and the hum reads what it was
    # (median within 0.8-1.25 of the normal one, the bound the analysis holds for 8x noise).
    from qcd import synth
    from qcd.config import TestPulse
    from qcd.report import build_report, parse_since
    from qcd.results import HINTS
    assert rules.settings.history_files < 36
    rig = RigConfig(name="rig-hs", folders=(tmp_path,), mains_hz=50.0,
                    test_pulse=TestPulse(-5.0, synth.STEP_START_S, synth.STEP_LEN_S))
    amps = (0.7e-12, 0.2e-12, 0.12e-12)
    rng = np.random.default_rng(8)
    hums = {False: [], True: []}
    at = T0
    for i in range(14 + 36):
        fault = i >= 14
        at += 8 * 3600.0 * np.exp(rng.normal(0.0, 0.1))
        sweeps = synth.whole_cell_sweeps(
            rng, n_sweeps=10, fs=10_000.0, fc=2_000.0, ra=10e6, rm=450e6, cm=30e-12,
            noise_sd=(4.2e-12 if fault else 1.2e-12) * np.exp(rng.normal(0.0, 0.05)),
            hum_amps=amps, holding=-40e-12, hum_phase=float(rng.uniform(0, 6.28)))
        path = tmp_path / f"cell{i:03d}.abf"
        synth.write_abf1(path, sweeps * 1e12, 10_000.0, "pA", at)
        fm = process(path, rig, store, rules, at + 60.0)
        assert fm.status == "ok", fm.error
        hums[fault].append(fm.channels[0].measures["hum_rms"].value)
    sent = stored.outbox_rows(store)
    assert {m["rig"] for m in sent} == {"rig-hs"}
    said = [m for m in sent if m["kind"] != "resolved"]
    assert len(said) >= 8 and sum(m["kind"] == "reminder" for m in said) >= 7
    broad = f"Possible source (a check to make, not a diagnosis): {HINTS['broad'].text}."
    for m in said:
        assert "noise_rms" in m["title"] and "hum" not in m["title"], m["title"]
        assert "headstage" in m["body"] and "broadband" in m["body"], m["title"]
        assert "grounding" not in m["body"] and "mains" not in m["body"], m["body"]
        # the broadband source alone: no band grew beyond the common factor
        hints = [line for line in m["body"].splitlines() if "Possible source" in line]
        assert hints and all(h.endswith(broad) for h in hints), hints
    report = build_report(store, at + 7.5 * 3600.0, parse_since("18h", at + 7.5 * 3600.0))
    (r,) = report.rigs
    assert r.hints and all("headstage" in h and "grounding" not in h for h in r.hints)
    assert r.safety_note is None
    truth = np.sqrt(sum(a * a / 2 for a in amps)) / 1e-12
    assert np.median(hums[False]) == pytest.approx(truth, rel=0.25)
    assert 0.8 <= np.median(hums[True]) / np.median(hums[False]) <= 1.25
