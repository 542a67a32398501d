"""The watch service: intake settle rules, real watchdog observers on real folders, catch-up,
a real SQLite store, and the `qcd watch` / `qcd status` commands in subprocesses.

Waits are bounded (wait-until-condition with a timeout); network only on 127.0.0.1.
"""
from __future__ import annotations

import contextlib
import hashlib
from collections import Counter
import os
import shutil
import time
from pathlib import Path

import numpy as np
import pytest

from conftest import abf
from stored import outbox_rows
from qcd import pipeline
from qcd.config import Config, RigConfig
from qcd.intake import GaveUp, Intake, header_fits, is_candidate_name
from qcd.store import Store
from qcd.ruleset import Rules, load_rules
from qcd.status import status
from qcd.watch import Service, is_network_path

RIG = "rig-a"


# ---------------------------------------------------------------- helpers

class _St:
    """A stat result for the intake tests (stat is passed in, never patched)."""

    def __init__(self, size: int, mtime: float) -> None:
        self.st_size, self.st_mtime = size, mtime


def _fake_stat(table: dict):
    def stat(path: str):
        if path not in table:
            raise FileNotFoundError(path)
        return _St(*table[path])
    return stat


def _fits(path, size):
    return None, None


def wait_until(cond, timeout: float, step=None, interval: float = 0.02):
    """Call step() (the service loop body) until cond() is true; fail after timeout seconds."""
    deadline = time.monotonic() + timeout
    while True:
        if step is not None:
            step()
        if cond():
            return
        if time.monotonic() > deadline:
            raise AssertionError(f"condition not met within {timeout} s")
        time.sleep(interval)


def _config(tmp_path: Path, folders, *, settle_s=0.5, give_up_h=1.0, polling=False,
            patterns=("*.abf",)) -> Config:
    return Config(path=None, database=tmp_path / "qcd.sqlite", rules=(), settle_seconds=settle_s,
                  give_up_hours=give_up_h,
                  rigs=(RigConfig(RIG, tuple(folders), patterns=patterns, polling=polling),))


class Recorder:
    """Counts what the service commits; measures and commits through the real pipeline."""

    def __init__(self, store: Store, rules: Rules | None = None) -> None:
        self.store = store
        self.committed: list = []
        self.rules = rules or load_rules()

    def measure(self, path: str, rig):
        return pipeline.measure(path, rig)

    def commit(self, fm, rig, now):
        self.committed.append(fm)
        return pipeline.commit(fm, rig, self.store, self.rules, now)

    def paths(self):
        return [Path(fm.path).name for fm in self.committed]


@contextlib.contextmanager
def _running(cfg, store, **kw):
    """A started service (measuring on its own thread) with its Recorder and loop step."""
    rec = Recorder(store)
    svc = _service(cfg, store, rec, **kw)
    svc.start(time.time())
    try:
        yield svc, rec, lambda: svc.step(time.time())
    finally:
        svc.close()


def _service(cfg, store, rec: Recorder, **kw) -> Service:
    kw.setdefault("workers", 0)
    kw.setdefault("poll_s", 0.02)
    kw.setdefault("folder_check_s", 0.2)
    kw.setdefault("progress_tty", False)
    return Service(cfg, store, commit=rec.commit, **kw)


def _write_slowly(path: Path, data: bytes, pieces: int, gap_s: float, step) -> None:
    """Write data in pieces gap_s apart, running the service loop meanwhile."""
    with open(path, "wb") as f:
        for i in range(pieces):
            f.write(data[i * len(data) // pieces:(i + 1) * len(data) // pieces])
            f.flush()
            end = time.monotonic() + gap_s
            while time.monotonic() < end:
                step()
                time.sleep(0.02)


def _tiny_abf(path: Path, seed: int) -> None:
    """A small, distinct ABF1 file written with pyabf's own writer."""
    import pyabf.abfWriter
    rng = np.random.default_rng(seed)
    sweeps = rng.normal(0.0, 5.0, size=(1, 2000)).astype(np.float32)
    pyabf.abfWriter.writeABF1(sweeps, str(path), 10000.0, units="pA")


# ---------------------------------------------------------------- intake, chosen timestamps

def test_growing_file_is_ready_only_after_settle_seconds():
    table = {"/r/a.abf": (100, 1.0)}
    it = Intake(settle_s=5.0, give_up_s=3600.0, stat=_fake_stat(table), header_check=_fits,
                probe=lambda p: False)
    it.offer(RIG, Path("/r/a.abf"), 1.0)
    assert it.check(1.0) == ([], [])           # first sight: unchanged for 0 s
    table["/r/a.abf"] = (200, 3.0)             # it grew
    assert it.check(6.0) == ([], [])           # the change is seen now: settles at 11.0
    assert it.check(10.9) == ([], [])
    ready, _ = it.check(11.0)
    assert [r.path for r in ready] == [Path("/r/a.abf")] and ready[0].size == 200
    assert len(it) == 0


def test_duplicate_hints_collapse_into_one_item():
    table = {"/r/a.abf": (100, 1.0)}
    it = Intake(settle_s=1.0, give_up_s=3600.0, stat=_fake_stat(table), header_check=_fits,
                probe=lambda p: False)
    for t in (0.0, 0.1, 0.2, 0.3):
        it.offer(RIG, Path("/r/a.abf"), t, closed=(t == 0.3))
    assert len(it) == 1
    it.check(0.3)
    ready, _ = it.check(1.3)
    assert len(ready) == 1 and it.check(5.0) == ([], [])


def test_truncated_header_waits_then_hands_over_for_the_real_error():
    table = {"/r/a.abf": (100, 0.0)}
    calls = []

    def header(path, size):
        calls.append(size)
        return "header implies more data than present", None
    it = Intake(settle_s=1.0, give_up_s=100.0, stat=_fake_stat(table), header_check=header,
                probe=lambda p: False)
    it.offer(RIG, Path("/r/a.abf"), 0.0)
    for t in (0.0, 1.0, 2.0, 50.0):
        assert it.check(t) == ([], [])
    assert calls                               # the header was consulted, and said "not yet"
    ready, gave_up = it.check(100.5)
    # settled but never fit: the pipeline gets it so the stored error is 'truncated'
    assert ready == [] and gave_up == [GaveUp(RIG, Path("/r/a.abf"), "", 100, 0.0)]


def test_file_that_keeps_changing_is_given_up_as_never_settled():
    table = {"/r/a.abf": (0, 0.0)}
    it = Intake(settle_s=2.0, give_up_s=10.0, stat=_fake_stat(table), header_check=_fits,
                probe=lambda p: False)
    it.offer(RIG, Path("/r/a.abf"), 0.0)
    t = 0.0
    gave_up = []
    while t < 12.0 and not gave_up:
        table["/r/a.abf"] = (int(t * 10) + 1, t)   # grows every second
        ready, gave_up = it.check(t)
        assert ready == []
        t += 1.0
    assert len(gave_up) == 1 and gave_up[0].reason
    assert "still changing" in gave_up[0].reason and "/r/a.abf" in gave_up[0].reason


def test_live_files_go_ahead_of_the_backlog_and_backlog_is_oldest_first():
    table = {f"/r/b{i}.abf": (10, float(100 - i)) for i in range(20)}
    table["/r/new.abf"] = (10, 1000.0)
    it = Intake(settle_s=1.0, give_up_s=3600.0, stat=_fake_stat(table), header_check=_fits,
                probe=lambda p: False)
    for i in range(20):
        it.offer(RIG, Path(f"/r/b{i}.abf"), 1000.0, live=False, mtime=float(100 - i))
    it.offer(RIG, Path("/r/new.abf"), 1000.0, live=True)
    assert it.check(1000.0, backlog_window=0) == ([], [])   # new.abf first seen: settling
    ready, _ = it.check(1001.0, backlog_window=3)
    names = [r.path.name for r in ready]
    assert names[0] == "new.abf"               # the live file first
    assert names[1:] == ["b19.abf", "b18.abf", "b17.abf"]   # then the oldest mtimes, 3 at a time
    assert it.counts() == {"live": 0, "backlog": 17}


def test_event_for_a_backlog_file_moves_it_to_the_live_lane():
    table = {"/r/old.abf": (10, 5.0), "/r/x.abf": (10, 1.0)}
    it = Intake(settle_s=1.0, give_up_s=3600.0, stat=_fake_stat(table), header_check=_fits,
                probe=lambda p: False)
    it.offer(RIG, Path("/r/x.abf"), 10.0, live=False, mtime=1.0)
    it.offer(RIG, Path("/r/old.abf"), 10.0, live=False, mtime=5.0)
    it.offer(RIG, Path("/r/old.abf"), 10.0, live=True)   # an event: it may be changing again
    assert it.check(10.0, backlog_window=0) == ([], [])
    ready, _ = it.check(11.0, backlog_window=0)
    assert [r.path.name for r in ready] == ["old.abf"] and ready[0].live


@pytest.mark.parametrize("name,ok", [
    ("cell01.abf", True), ("CELL01.ABF", True), (".cell01.abf", False), ("~$cell01.abf", False),
    ("cell01.abf.tmp", False), ("cell01.abf.part", False), ("cell01.crdownload", False),
    ("cell01.txt", False), ("notes.abf~", False)])
def test_temporary_and_hidden_names_are_ignored(name, ok):
    assert is_candidate_name(Path("/r") / name, ("*.abf",), Path("/r")) is ok


def test_files_in_hidden_folders_are_ignored():
    assert not is_candidate_name(Path("/r/.trash/a.abf"), ("*.abf",), Path("/r"))
    assert is_candidate_name(Path("/r/day1/a.abf"), ("*.abf",), Path("/r"))


def test_network_mounts_are_detected_from_the_mount_table():
    # /proc/mounts format: device mountpoint fstype options (proc(5))
    mounts = ("/dev/sda1 / ext4 rw 0 0\n//nas/lab /mnt/lab cifs rw 0 0\n"
              "srv:/data /mnt/nfs nfs4 rw 0 0\nu@h:/x /mnt/my\\040share fuse.sshfs rw 0 0\n")
    assert is_network_path(Path("/mnt/lab/rig1"), mounts_text=mounts, platform="linux")
    assert is_network_path(Path("/mnt/nfs"), mounts_text=mounts, platform="linux")
    assert is_network_path(Path("/mnt/my share/a"), mounts_text=mounts, platform="linux")
    assert not is_network_path(Path("/home/lab"), mounts_text=mounts, platform="linux")
    assert not is_network_path(Path("/mnt/labx"), mounts_text=mounts, platform="linux")
    assert is_network_path(Path("//nas/share/rig"), platform="win32") or os.name != "nt"


def test_header_check_says_truncated_copy_is_not_ready(tmp_path):
    data = abf("vc_cell_step.abf").read_bytes()
    p = tmp_path / "part.abf"
    p.write_bytes(data[:len(data) // 2])
    assert header_fits(p, p.stat().st_size)   # a reason: cut short / still being written
    p.write_bytes(data)
    assert header_fits(p, p.stat().st_size) is None


# ---------------------------------------------------------------- real observers and store

@pytest.mark.slow
@pytest.mark.parametrize("polling", [False, True], ids=["native", "polling"])
def test_file_written_in_pieces_is_measured_once_after_it_settled(tmp_path, store, polling):
    folder = tmp_path / "rig"
    folder.mkdir()
    cfg = _config(tmp_path, [folder], settle_s=1.0, polling=polling)
    with _running(cfg, store, poll_interval_s=0.2) as (svc, rec, step):
        src = abf("vc_cell_step.abf").read_bytes()
        target = folder / "cell01.abf"
        _write_slowly(target, src, 5, 0.5, step)
        closed_at = time.monotonic()
        assert rec.committed == []             # nothing measured while it was being written
        wait_until(lambda: rec.committed, 10.0, step)
        assert time.monotonic() - closed_at >= 0.5   # it waited for the file to settle
        # keep the loop going: no second measurement of the same file
        end = time.monotonic() + 1.0
        while time.monotonic() < end:
            step()
            time.sleep(0.02)
    assert rec.paths() == ["cell01.abf"]
    rows = store.files(rig=RIG, include_superseded=True)
    assert len(rows) == 1 and rows[0]["status"] == "ok"
    # the values are those of the complete file: same content hash, same as measuring it now
    fm = rec.committed[0]
    assert fm.sha256 == hashlib.sha256(src).hexdigest()
    finished = rec.measure(str(target), cfg.rigs[0])
    assert fm == finished


def test_corrupt_file_is_stored_as_error_and_next_file_is_measured(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    cfg = _config(tmp_path, [folder], settle_s=0.3)
    with _running(cfg, store) as (svc, rec, step):
        (folder / "broken.abf").write_bytes(b"this is not a recording" * 100)
        wait_until(lambda: len(rec.committed) == 1, 10.0, step)
        shutil.copy(abf("vc_model_cell_step.abf"), folder / "good.abf")
        wait_until(lambda: len(rec.committed) == 2, 10.0, step)
    by_name = {Path(r["path"]).name: r for r in store.files(rig=RIG)}
    assert by_name["broken.abf"]["status"] == "error"
    assert by_name["broken.abf"]["error_kind"] == "bad_signature"
    assert "broken.abf" in by_name["broken.abf"]["error"]
    assert by_name["good.abf"]["status"] == "ok"


def test_folder_removed_and_recreated_is_watched_again(tmp_path, store):
    folder = tmp_path / "usb" / "rig"
    folder.mkdir(parents=True)
    cfg = _config(tmp_path, [folder], settle_s=0.3)
    with _running(cfg, store) as (svc, rec, step):
        shutil.copy(abf("vc_model_cell_step.abf"), folder / "one.abf")
        wait_until(lambda: len(rec.committed) == 1, 10.0, step)
        shutil.rmtree(tmp_path / "usb")        # unplugged
        wait_until(lambda: svc._folders[0].state == "missing", 10.0, step)
        folder.mkdir(parents=True)             # plugged in again
        shutil.copy(abf("vc_cell_step.abf"), folder / "two.abf")
        wait_until(lambda: len(rec.committed) == 2, 15.0, step)
        shutil.copy(abf("cc_steps.abf"), folder / "three.abf")
        wait_until(lambda: len(rec.committed) == 3, 10.0, step)
    assert sorted(rec.paths()) == ["one.abf", "three.abf", "two.abf"]


def test_files_in_a_new_subfolder_are_measured_and_hidden_folders_ignored(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    cfg = _config(tmp_path, [folder], settle_s=0.3)
    with _running(cfg, store) as (svc, rec, step):
        (folder / ".trash").mkdir()
        shutil.copy(abf("cc_steps.abf"), folder / ".trash" / "deleted.abf")
        (folder / "day2").mkdir()
        shutil.copy(abf("vc_model_cell_step.abf"), folder / "day2" / "a.abf")
        # a whole tree moved in at once (made elsewhere: nested mkdir under a live inotify
        # watch can make watchdog 7.1 warn from its own thread)
        staged = tmp_path / "staging" / "2026-12-02" / "cell1"
        staged.mkdir(parents=True)
        shutil.copy(abf("cc_steps.abf"), staged / "b.abf")
        os.rename(tmp_path / "staging" / "2026-12-02", folder / "2026-12-02")
        wait_until(lambda: len(rec.committed) >= 2, 10.0, step)
        end = time.monotonic() + 1.0
        while time.monotonic() < end:
            step()
            time.sleep(0.02)
    assert sorted(rec.paths()) == ["a.abf", "b.abf"]


def test_catch_up_queues_new_and_changed_files_and_skips_stored_ones(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    for name, src in [("a.abf", "vc_cell_step.abf"), ("b.abf", "cc_steps.abf"),
                      ("c.abf", "vc_model_cell_step.abf")]:
        shutil.copy(abf(src), folder / name)
    os.utime(folder / "a.abf", (1000.0, 1000.0))
    os.utime(folder / "b.abf", (3000.0, 3000.0))
    os.utime(folder / "c.abf", (2000.0, 2000.0))
    (folder / "skip.abf.part").write_bytes(b"x")
    cfg = _config(tmp_path, [folder], settle_s=0.3)
    rec = Recorder(store)
    svc = _service(cfg, store, rec)
    svc.start(time.time())
    try:
        wait_until(lambda: len(rec.committed) == 3, 20.0, lambda: svc.step(time.time()))
    finally:
        svc.close()
    assert rec.paths() == ["a.abf", "c.abf", "b.abf"]       # oldest first
    # b changes while the service is down; a and c do not
    shutil.copy(abf("vc_step_series_tagged.abf"), folder / "b.abf")
    rec2 = Recorder(store)
    svc = _service(cfg, store, rec2)
    svc.start(time.time())
    try:
        wait_until(lambda: len(rec2.committed) == 1, 20.0, lambda: svc.step(time.time()))
        end = time.monotonic() + 1.0
        while time.monotonic() < end:
            svc.step(time.time())
            time.sleep(0.02)
    finally:
        svc.close()
    assert rec2.paths() == ["b.abf"]
    rows = {Path(r["path"]).name for r in store.files(rig=RIG)}
    assert rows == {"a.abf", "b.abf", "c.abf"}
    assert len(store.files(rig=RIG, include_superseded=True)) == 4


def test_new_file_goes_ahead_of_a_backlog(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    for i in range(40):
        _tiny_abf(folder / f"old{i:03d}.abf", i)
        os.utime(folder / f"old{i:03d}.abf", (1000.0 + i, 1000.0 + i))
    cfg = _config(tmp_path, [folder], settle_s=0.3)
    with _running(cfg, store) as (svc, rec, step):
        wait_until(lambda: len(rec.committed) >= 2, 10.0, step)
        _tiny_abf(folder / "new.abf", 999)
        wait_until(lambda: "new.abf" in rec.paths(), 10.0, step)
        position = rec.paths().index("new.abf")
        wait_until(lambda: len(rec.committed) == 41, 30.0, step)
    # with one file measured per step, the new file passes the rest of the backlog
    assert position < 20, rec.paths()


def test_never_settled_file_is_stored_as_error(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    p = folder / "stuck.abf"
    data = abf("vc_cell_step.abf").read_bytes()
    p.write_bytes(data[:5000])
    sizes = {"n": 5000}

    def growing_stat(path: str):              # the acquisition keeps appending
        st = os.stat(path)
        if path == os.fspath(p):
            sizes["n"] += 1
            return _St(sizes["n"], st.st_mtime + sizes["n"])
        return st
    cfg = _config(tmp_path, [folder], settle_s=1.0, give_up_h=0.01)   # 36 s
    rec = Recorder(store)
    svc = _service(cfg, store, rec, stat=growing_stat, rescan_s=1e9)
    t0 = time.time()
    svc.start(t0)
    try:
        for t in np.arange(0.0, 40.0, 0.5):   # chosen timestamps: no waiting for 36 s
            svc.step(t0 + t)
    finally:
        svc.close(t0 + 40.0)
    rows = store.files(rig=RIG)
    assert len(rows) == 1 and rows[0]["error_kind"] == "never_settled"
    assert "stuck.abf" in rows[0]["error"] and "give_up_hours" in rows[0]["error"]


def test_measuring_in_worker_processes(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    for i in range(4):
        _tiny_abf(folder / f"f{i}.abf", 100 + i)
    cfg = _config(tmp_path, [folder], settle_s=0.2)
    rec = Recorder(store)
    svc = Service(cfg, store, workers=2, commit=rec.commit, poll_s=0.02, progress_tty=False)
    svc.start(time.time())
    try:
        wait_until(lambda: len(rec.committed) == 4, 60.0, lambda: svc.step(time.time()))
    finally:
        svc.close()
    assert sorted(rec.paths()) == [f"f{i}.abf" for i in range(4)]
    assert [fm.status for fm in rec.committed] == ["ok"] * 4


def _at_commits(store: Store, count) -> list[int]:
    """count() at each COMMIT the store's connection runs (sqlite3's own trace callback)."""
    seen: list[int] = []
    store.db.conn.set_trace_callback(
        lambda sql: seen.append(count()) if sql.strip().upper() == "COMMIT" else None)
    return seen


def test_backlog_files_share_transactions_in_recording_order(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    _tiny_abf(tmp_path / "template.abf", 0)
    template = (tmp_path / "template.abf").read_bytes()
    n = 40
    for i in range(n):                         # mtimes run backwards to the names
        p = folder / f"f{i:02d}.abf"
        p.write_bytes(template[:-4] + i.to_bytes(4, "little"))
        os.utime(p, (1e9 - i * 60, 1e9 - i * 60))
    cfg = _config(tmp_path, [folder], settle_s=0.2)
    rec = Recorder(store)
    svc = Service(cfg, store, workers=2, commit=rec.commit, poll_s=0.02, progress_tty=False,
                  beat_s=1e9)
    svc.group_files, svc.group_s = 8, 30.0    # groups close by their size here
    commits = _at_commits(store, lambda: len(rec.committed))
    svc.start(time.time())
    try:
        wait_until(lambda: len(rec.committed) == n, 60.0,
                   lambda: svc.step(time.time()) or svc.wait_idle(), interval=0.0)
    finally:
        svc.close()
        store.db.conn.set_trace_callback(None)
    stored = store.files(rig=RIG, include_superseded=True)
    assert len(stored) == n
    # one COMMIT for up to 8 files (the heartbeat and the digest commit on their own)
    groups = [b - a for a, b in zip([0] + commits, commits) if b > a]
    assert sum(groups) == n and max(groups) <= 8 and len(groups) <= n // 2, groups
    # within each transaction the files are stored oldest recording first
    ends = [0] + [e for a, e in zip([0] + commits, commits) if e > a]
    for a, b in zip(ends, ends[1:]):
        times = [fm.mtime for fm in rec.committed[a:b]]
        assert times == sorted(times), times


@pytest.mark.slow
def test_a_worker_killed_mid_batch_loses_no_file_and_stores_none_twice(tmp_path, store, caplog):
    """Small backlog files go to the workers several to a job; kill -9 of a worker while
    batches are out: each file of them is measured again (qcd.workers' crash rule), every file
    ends with exactly one row, all measured (the files themselves are fine)."""
    import multiprocessing
    import pyabf.abfWriter
    folder = tmp_path / "rig"
    folder.mkdir()
    # 200,000 samples a file: a batch of them takes long enough to be killed half-way
    sweeps = np.random.default_rng(0).normal(0.0, 5.0, size=(1, 200_000)).astype(np.float32)
    pyabf.abfWriter.writeABF1(sweeps, str(tmp_path / "template.abf"), 10000.0, units="pA")
    template = (tmp_path / "template.abf").read_bytes()
    n = 96
    for i in range(n):
        p = folder / f"f{i:03d}.abf"
        p.write_bytes(template[:-4] + i.to_bytes(4, "little"))
        os.utime(p, (1e9 + i, 1e9 + i))
    cfg = _config(tmp_path, [folder], settle_s=0.2)
    rec = Recorder(store)
    svc = Service(cfg, store, workers=2, commit=rec.commit, poll_s=0.02, progress_tty=False)
    assert svc.batch_files > 1
    killed = []
    step = lambda: svc.step(time.time()) or svc.wait_idle()
    with caplog.at_level("INFO", logger="qcd"):
        svc.start(time.time())
        try:
            wait_until(lambda: len(rec.committed) >= 16, 60.0, step, interval=0.0)
            in_flight = len(svc._jobs)
            workers = multiprocessing.active_children()
            assert workers and in_flight > svc.batch_files, (workers, in_flight)
            os.kill(workers[0].pid, signal.SIGKILL)
            killed.append(workers[0].pid)
            wait_until(lambda: len(rec.committed) >= n, 120.0, step, interval=0.0)
            for _ in range(20):               # nothing more arrives (no second copy)
                step()
        finally:
            svc.close()
    assert "a worker process died" in caplog.text       # the kill really hit the pool
    assert sorted(rec.paths()) == [f"f{i:03d}.abf" for i in range(n)]      # each once
    assert [fm.status for fm in rec.committed] == ["ok"] * n
    rows = store.files(rig=RIG, include_superseded=True)
    assert len(rows) == n and all(r["status"] == "ok" for r in rows)


def test_a_lone_new_file_is_committed_at_once_not_held_for_a_group(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    cfg = _config(tmp_path, [folder], settle_s=0.2)
    rec = Recorder(store)
    svc = Service(cfg, store, workers=2, commit=rec.commit, poll_s=0.02, progress_tty=False)
    svc.group_s = 600.0                        # a group would wait 10 min for more files
    svc.start(time.time())
    try:
        _tiny_abf(folder / "new.abf", 7)
        wait_until(lambda: rec.committed, 30.0,
                   lambda: svc.step(time.time()) or svc.wait_idle(), interval=0.0)
        assert store.file_state(RIG, os.path.realpath(folder / "new.abf")) is not None
    finally:
        svc.close()


@pytest.mark.slow
def test_thousand_small_files_dropped_at_once_are_all_measured(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    staging = tmp_path / "staging"
    staging.mkdir()
    _tiny_abf(tmp_path / "template.abf", 0)
    template = (tmp_path / "template.abf").read_bytes()
    for i in range(1000):                      # distinct content: the store keeps one per sha256
        (staging / f"s{i:04d}.abf").write_bytes(template[:-4] + i.to_bytes(4, "little"))
    cfg = _config(tmp_path, [folder], settle_s=0.3)
    # the burst is the point here, not judging (test_pipeline and test_judge do that): no rules
    (tmp_path / "no_rules.toml").write_text("[settings]\n")
    rec = Recorder(store, load_rules([tmp_path / "no_rules.toml"]))
    # measured in two worker processes, as the service runs by default
    svc = Service(cfg, store, workers=2, commit=rec.commit, poll_s=0.02, progress_tty=False)
    svc.start(time.time())
    try:
        for f in staging.iterdir():
            os.rename(f, folder / f.name)      # moved in: watchdog reports dest_path
        wait_until(lambda: len(rec.committed) >= 1000, 120.0,
                   lambda: svc.step(time.time()) or svc.wait_idle(), interval=0.0)
    finally:
        svc.close()
    assert len(rec.committed) == 1000
    assert all(fm.status == "ok" for fm in rec.committed)
    assert len(store.files(rig=RIG, include_superseded=True)) == 1000


def test_periodic_rescan_finds_a_file_the_events_missed(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    cfg = _config(tmp_path, [folder], settle_s=0.2)
    rec = Recorder(store)
    svc = _service(cfg, store, rec, rescan_s=60.0, folder_check_s=1e9)
    t0 = time.time()
    svc.start(t0)
    try:
        svc._folders[0].stop()                 # events lost (as in a Windows buffer overflow)
        shutil.copy(abf("vc_model_cell_step.abf"), folder / "missed.abf")
        for dt in (1.0, 2.0, 30.0):
            svc.step(t0 + dt)
        assert rec.committed == []             # no event, no rescan yet
        for dt in np.arange(60.0, 62.0, 0.1):  # the rescan is due at t0 + 60 s
            svc.step(t0 + dt)
    finally:
        svc.close()
    assert rec.paths() == ["missed.abf"]


def test_catch_up_progress_goes_to_the_log_off_a_terminal(tmp_path, store, caplog):
    folder = tmp_path / "rig"
    folder.mkdir()
    for i in range(5):
        _tiny_abf(folder / f"p{i}.abf", 500 + i)
    cfg = _config(tmp_path, [folder], settle_s=0.2)
    rec = Recorder(store)
    svc = _service(cfg, store, rec)
    with caplog.at_level("INFO", logger="qcd"):
        svc.start(time.time())
        try:
            wait_until(lambda: len(rec.committed) == 5, 20.0, lambda: svc.step(time.time()))
        finally:
            svc.close()
    text = caplog.text
    assert "start-up: 5 file(s) to catch up on" in text
    assert "catching up: 5 of 5 files measured" in text


def test_catch_up_draws_a_progress_bar_on_a_terminal(tmp_path, store, capsys):
    folder = tmp_path / "rig"
    folder.mkdir()
    for i in range(3):
        _tiny_abf(folder / f"t{i}.abf", 700 + i)
    cfg = _config(tmp_path, [folder], settle_s=0.2)
    rec = Recorder(store)
    svc = _service(cfg, store, rec, progress_tty=True)
    svc.start(time.time())
    try:
        wait_until(lambda: len(rec.committed) == 3, 20.0, lambda: svc.step(time.time()))
    finally:
        svc.close()
    err = capsys.readouterr().err
    assert "\rcatching up [" in err and "3/3 files" in err and err.endswith("\n")


def test_backlog_gives_one_digest_not_a_message_per_file(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    for i in range(6):                         # six unreadable files waiting at start-up
        (folder / f"bad{i}.abf").write_bytes(f"not a recording {i} ".encode() * 100)
    cfg = _config(tmp_path, [folder], settle_s=0.2)
    svc = Service(cfg, store, load_rules(), workers=0, poll_s=0.02, progress_tty=False)
    svc.start(time.time())
    try:
        wait_until(lambda: len(store.files(rig=RIG)) == 6, 20.0, lambda: svc.step(time.time()))
        wait_until(lambda: outbox_rows(store), 5.0, lambda: svc.step(time.time()))
        (folder / "bad_live.abf").write_bytes(b"also not a recording " * 100)
        wait_until(lambda: len(store.files(rig=RIG)) == 7, 20.0, lambda: svc.step(time.time()))
        for _ in range(10):
            svc.step(time.time())
    finally:
        svc.close()
    kinds = [r["kind"] for r in outbox_rows(store)]
    assert kinds.count("digest") == 1, kinds   # the six backlog files: one message
    assert len(kinds) <= 2, kinds              # plus at most one for the live file


def test_status_reports_a_stopped_service(tmp_path, store):
    folder = tmp_path / "rig"
    folder.mkdir()
    shutil.copy(abf("vc_model_cell_step.abf"), folder / "one.abf")
    cfg = _config(tmp_path, [folder], settle_s=0.2)
    rec = Recorder(store)
    svc = _service(cfg, store, rec, beat_s=1.0)
    svc.start(time.time())
    try:
        wait_until(lambda: rec.committed, 10.0, lambda: svc.step(time.time()))
        wait_until(lambda: status(store, time.time())["queue_len"] == 0, 5.0,
                   lambda: svc.step(time.time()))
        live = status(store, time.time())
        assert live["alive"] and "alive" in live["reason"]
    finally:
        svc.close()
    st = status(store, time.time())
    assert not st["alive"] and "stopped" in st["reason"]
    assert Path(st["last_file"][RIG]["path"]).name == "one.abf"
    assert st["outbox"]["pending"] == 0


# ---------------------------------------------------------------- `qcd watch` as a process

import signal  # noqa: E402
import sqlite3  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402

from sinks import HttpSink  # noqa: E402

# distinct real recordings (the store keeps one row per content, so copies must differ)
_REAL = ["vc_model_cell_step.abf", "cc_steps.abf", "variable_sweep_length.abf",
         "odd_sample_rate.abf", "vc_units_A_no_protocol.abf", "gapfree_cc_slow_drift.abf",
         "abf1_invalid_date.abf", "vc_holding_change_pressure.abf", "cc_user_list_steps.abf",
         "vc_recorded_command_3ch.abf", "four_channel_no_cell_abf1.abf", "cc_steps_abf1.abf"]


def _write_toml(tmp_path: Path, sink_url: str) -> Path:
    (tmp_path / "rig").mkdir(exist_ok=True)
    cfg = tmp_path / "qcd.toml"
    cfg.write_text(f'database = "db/qcd.sqlite"\nsettle_seconds = 0.5\ngive_up_hours = 1\n'
                   f'notify = ["{sink_url}"]\n\n[[rig]]\nname = "{RIG}"\nfolders = ["rig"]\n')
    (tmp_path / "db").mkdir(exist_ok=True)
    return cfg


class _Watch:
    """`qcd watch` in a subprocess, its stderr kept in a file for failure messages."""

    def __init__(self, cfg: Path, n: int, workers: int = 1) -> None:
        self.err = cfg.parent / f"watch{n}.err"
        self._f = open(self.err, "wb")
        self.proc = subprocess.Popen([sys.executable, "-m", "qcd", "watch", "--config",
                                      str(cfg), "--workers", str(workers)],
                                     stdout=subprocess.DEVNULL, stderr=self._f)

    def wait(self, timeout: float) -> int:
        try:
            return self.proc.wait(timeout=timeout)
        finally:
            self._f.close()

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
        self.wait(10)

    def log(self) -> str:
        return self.err.read_text(errors="replace")[-3000:]


def _db_rows(db: Path, sql: str) -> list[tuple]:
    if not db.exists():
        return []
    with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10) as conn:
        try:
            return conn.execute(sql).fetchall()
        except sqlite3.OperationalError:      # tables not created yet
            return []


def _n_files(db: Path) -> int:
    return len(_db_rows(db, "SELECT id FROM files WHERE superseded = 0"))


def _status(cfg: Path) -> subprocess.CompletedProcess:
    """`qcd status`, run in this process (the same command, without starting an interpreter)."""
    import io
    from qcd.cli import main
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        code = main(["status", "--config", str(cfg)])
    return subprocess.CompletedProcess(["qcd", "status"], code, out.getvalue(), "")


def _children(pid: int) -> list[int]:
    """Child process ids (Linux /proc; empty elsewhere)."""
    out = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            out += [int(c) for c in (task / "children").read_text().split()]
        except OSError:
            pass
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"                        # a zombie has exited


def _arrive(folder: Path, names, corrupt: int = 0) -> None:
    for name in names:
        shutil.copy(abf(name), folder / name)
    for i in range(corrupt):
        (folder / f"corrupt{i}.abf").write_bytes(f"not a recording {i} ".encode() * 200)


@pytest.mark.slow


@contextlib.contextmanager
def _sink_and_services():
    """A loopback HTTP sink and a list for the ``_Watch`` services a test starts; at the end
    every service still running is killed and the sink stopped."""
    sink = HttpSink().start()
    watches: list = []
    try:
        yield sink, watches
    finally:
        for w in watches:
            w.kill()
        sink.stop()


def _stop_cleanly(w) -> None:
    """SIGTERM: the service finishes what it holds and exits with 0."""
    w.proc.send_signal(signal.SIGTERM)
    assert w.wait(30) == 0, w.log()


def test_kill_9_and_restart_lose_nothing_and_store_nothing_twice(tmp_path):
    with _sink_and_services() as (sink, watches):
        cfg = _write_toml(tmp_path, sink.url)
        folder, db = tmp_path / "rig", tmp_path / "db" / "qcd.sqlite"
        w = _Watch(cfg, 1)
        watches.append(w)
        _arrive(folder, _REAL[:2], corrupt=1)
        wait_until(lambda: _n_files(db) >= 1, 60.0)
        _arrive(folder, _REAL[2:6])            # still arriving when it is killed
        time.sleep(0.3)
        children = _children(w.proc.pid)
        assert children or not sys.platform.startswith("linux")   # the measuring process
        w.kill()
        assert w.proc.returncode == -signal.SIGKILL
        # a message it had sent but not yet marked sent goes out once more (at least once)
        in_flight = [t for t, s in _db_rows(db, "SELECT title, status FROM outbox")
                     if s == "pending"]
        # its measuring processes do not outlive it (no orphans holding files open)
        wait_until(lambda: not any(_alive(c) for c in children), 15.0)
        assert 1 <= _n_files(db) < 7           # killed part-way through the arrivals
        st = _status(cfg)
        assert st.returncode == 1 and "not running" in st.stdout, st.stdout
        _arrive(folder, _REAL[6:], corrupt=0)  # written while it is down
        (folder / "corrupt1.abf").write_bytes(b"\x00garbage" * 300)
        w = _Watch(cfg, 2)
        watches.append(w)
        total = len(_REAL) + 2
        wait_until(lambda: _n_files(db) == total, 90.0)
        pending = lambda: _db_rows(db, "SELECT id FROM outbox WHERE status != 'sent'")
        wait_until(lambda: not pending(), 30.0)
        st = _status(cfg)
        assert st.returncode == 0 and "alive" in st.stdout, st.stdout
        _stop_cleanly(w)
    # every file exactly one row, never superseded by a second measurement of the same file
    rows = _db_rows(db, "SELECT path, status, error_kind FROM files")
    names = sorted(Path(p).name for p, _, _ in rows)
    assert names == sorted(_REAL + ["corrupt0.abf", "corrupt1.abf"])
    kinds = {Path(p).name: k for p, s, k in rows if s == "error"}
    assert kinds == {"corrupt0.abf": "bad_signature", "corrupt1.abf": "bad_signature"}
    dup = _db_rows(db, "SELECT file_id, channel, name, COUNT(*) FROM measures "
                       "GROUP BY file_id, channel, name HAVING COUNT(*) > 1")
    assert dup == []
    assert _db_rows(db, "SELECT COUNT(*) FROM measures")[0][0] > 0
    # every message was delivered, once
    outbox = _db_rows(db, "SELECT title, status FROM outbox")
    assert outbox and all(s == "sent" for _, s in outbox)   # the corrupt files alerted at least
    received = Counter(m["title"] for m in sink.received)
    queued = Counter(t for t, _ in outbox)
    assert not queued - received, sink.received               # none lost
    # none twice, except one that was in flight when the process was killed
    assert not (received - queued) - Counter(in_flight), sink.received


@pytest.mark.slow
def test_kill_9_in_a_batched_backlog_stores_each_file_once_and_sends_each_message_once(
        tmp_path):
    """Files of a backlog are committed several to a transaction (group commit); a kill -9
    in the middle loses only the files of the open transaction, which the restart measures
    again: every file ends with exactly one row, every message is sent once."""
    n_good, n_bad = 240, 6
    with _sink_and_services() as (sink, watches):
        cfg = _write_toml(tmp_path, sink.url)
        folder, db = tmp_path / "rig", tmp_path / "db" / "qcd.sqlite"
        _tiny_abf(folder / "t.abf", 0)
        template = (folder / "t.abf").read_bytes()
        (folder / "t.abf").unlink()
        for i in range(n_good):              # distinct contents: the last sample's bytes
            p = folder / f"f{i:04d}.abf"
            p.write_bytes(template[:-4] + i.to_bytes(4, "little"))
            os.utime(p, (1e9 + i, 1e9 + i))
        for i in range(n_bad):               # unreadable files: alerts, told in the digest
            p = folder / f"g{i:04d}.abf"
            p.write_bytes(f"not a recording {i} ".encode() * 200)
            os.utime(p, (1e9 + n_good + i, 1e9 + n_good + i))
        total = n_good + n_bad
        w = _Watch(cfg, 1, workers=2)
        watches.append(w)
        wait_until(lambda: _n_files(db) >= 40, 120.0, interval=0.005)
        w.kill()
        assert w.proc.returncode == -signal.SIGKILL
        stored = _n_files(db)
        assert 40 <= stored < total, stored    # killed part-way through the backlog
        assert _db_rows(db, "SELECT COUNT(*) FROM outbox")[0][0] == 0   # backlog: no message yet
        w = _Watch(cfg, 2, workers=2)
        watches.append(w)
        wait_until(lambda: _n_files(db) == total, 120.0)
        wait_until(lambda: _db_rows(db, "SELECT COUNT(*) FROM outbox")[0][0] > 0 and not
                   _db_rows(db, "SELECT id FROM outbox WHERE status != 'sent'"), 30.0)
        _stop_cleanly(w)
    assert _db_rows(db, "PRAGMA integrity_check") == [("ok",)]
    # every file exactly one row (none stored twice, none superseded by a second measuring)
    rows = _db_rows(db, "SELECT path, status FROM files")
    assert sorted(Path(p).name for p, _ in rows) == sorted(
        [f"f{i:04d}.abf" for i in range(n_good)] + [f"g{i:04d}.abf" for i in range(n_bad)])
    assert sum(s == "error" for _, s in rows) == n_bad
    orphans = _db_rows(db, "SELECT f.path FROM files f WHERE f.status = 'ok' AND NOT EXISTS "
                           "(SELECT 1 FROM measures m WHERE m.file_id = f.id)")
    assert orphans == []
    # every queued message sent exactly once (the backlog's digest names the bad files)
    outbox = _db_rows(db, "SELECT title, kind FROM outbox")
    assert [k for _, k in outbox].count("digest") == 1, outbox
    received = Counter(m["title"] for m in sink.received)
    assert received == Counter(t for t, _ in outbox), sink.received


@pytest.mark.slow
def test_sigterm_stops_cleanly_with_nothing_half_written(tmp_path):
    with _sink_and_services() as (sink, watches):
        cfg = _write_toml(tmp_path, sink.url)
        folder, db = tmp_path / "rig", tmp_path / "db" / "qcd.sqlite"
        w = _Watch(cfg, 1)
        watches.append(w)
        _arrive(folder, _REAL[:1])
        wait_until(lambda: _n_files(db) >= 1, 60.0)
        st = _status(cfg)
        assert st.returncode == 0 and "alive" in st.stdout and RIG in st.stdout, st.stdout
        _arrive(folder, _REAL[1:5])
        time.sleep(0.6)                        # mid-work: files settling and being measured
        _stop_cleanly(w)
        st = _status(cfg)
        assert st.returncode == 1 and "stopped cleanly" in st.stdout, st.stdout
    assert _db_rows(db, "PRAGMA integrity_check") == [("ok",)]
    # a stored ok file has all its channels and measures (one transaction per file)
    orphans = _db_rows(db, "SELECT f.path FROM files f WHERE f.status = 'ok' AND NOT EXISTS "
                           "(SELECT 1 FROM measures m WHERE m.file_id = f.id)")
    assert orphans == []
    assert (tmp_path / "db" / "qcd.log").is_file()   # the rotating log beside the database


def test_status_judges_liveness_by_heartbeat_age_and_pid(store):
    import socket
    now = 1_000_000.0
    here = socket.gethostname()
    store.beat(os.getpid(), here, now - 60, now - 2.0, 3, {"beat_s": 5.0})
    st = status(store, now)
    assert st["alive"] and st["queue_len"] == 3
    st = status(store, now + 20.0)             # 22 s > 3 x 5 s without a beat
    assert not st["alive"] and "not responding" in st["reason"]
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait(10)                              # a pid that no longer exists
    store.beat(dead.pid, here, now - 60, now - 1.0, 0, {"beat_s": 5.0})
    st = status(store, now)
    assert not st["alive"] and "is gone" in st["reason"]
    store.beat(dead.pid, "another-host", now - 60, now - 1.0, 0, {"beat_s": 5.0})
    assert status(store, now)["alive"]         # another machine's pid cannot be checked
