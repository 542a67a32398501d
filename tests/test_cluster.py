"""``qcd scan --store --cluster``: a real LocalCluster of 2 worker processes (dask.distributed)
measures, this process stores. The same archive stored inline, with ``--workers 2`` and on the
cluster must give the same rows, alerts and outbox; killing a worker or the client loses and
doubles nothing; files measured out of order are committed in recording order.

The archive: recordings of Johnson-Nyquist current noise through a 4-pole Bessel filter
(tests/test_pipeline.py's writer: Johnson 1928, Nyquist 1928), three of them with 5x the 50 Hz
line (faulty), and three corrupt files (cut short, no known signature, empty). File names do not
sort in recording order (the mtimes give it), so an ordering bug shows.
"""
from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

pytest.importorskip("distributed", reason="the cluster extra (qcd-ephys[cluster]) is not installed")

from qcd import cluster  # noqa: E402
from qcd.config import RigConfig  # noqa: E402
from qcd.errors import ConfigError  # noqa: E402
from qcd.pipeline import scan  # noqa: E402
from qcd.ruleset import load_rules  # noqa: E402
from qcd.store import Store  # noqa: E402

from test_pipeline import HUM_PA, STEP, T0, write_recording  # noqa: E402

RIG = "rig-archive"
N_FILES = 50
FAULTY = {46, 47, 48, 49}           # 5x hum at the end: one hum alert opens, still open
CORRUPT = {7: "truncated", 23: "bad_signature", 31: "empty"}
ROOT = Path(__file__).resolve().parent.parent

# a LocalCluster: over 3 s, and bounded so a hung engine fails the test instead of the run
on_cluster = pytest.mark.timeout(240)


def _name(i: int) -> str:
    return f"{(i * 37) % N_FILES:02d}-cell.abf"     # name order is not recording order


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    """(folder, paths in recording order) of N_FILES files."""
    folder = tmp_path_factory.mktemp("archive")
    paths = []
    for i in range(N_FILES):
        at = T0 + i * STEP
        p = folder / _name(i)
        if i in CORRUPT:
            kind = CORRUPT[i]
            if kind == "truncated":
                write_recording(p, 1000 + i, HUM_PA, at)
                p.write_bytes(p.read_bytes()[:3000])
            elif kind == "bad_signature":
                p.write_bytes(b"\x89PNG not a recording" * 40)
            else:
                p.write_bytes(b"")
            os.utime(p, (at, at))
        else:
            write_recording(p, i, 5 * HUM_PA if i in FAULTY else HUM_PA, at)
        paths.append(p)
    return folder, paths


@pytest.fixture(scope="module")
def rules():
    return load_rules()


@pytest.fixture
def rig(archive):
    return RigConfig(name=RIG, folders=(archive[0],), mains_hz=50.0)


@pytest.fixture(scope="module")
def client():
    """One LocalCluster of 2 single-thread worker processes for the module; a file may kill
    its worker twice before it is an error row. Tests that kill workers leave their restart to
    the engine's nannies, in the background; a test that needs both waits for them."""
    with cluster.connect(cluster.Target(None, 2), attempts=2, quiet=True) as c:
        yield c


def _clock(start: float = T0 + N_FILES * STEP + 60.0):
    """The same sequence of 'now' for every run: one second per call."""
    t = [start]

    def now() -> float:
        t[0] += 1.0
        return t[0]
    return now


def _dump(store: Store) -> dict[str, list[tuple]]:
    """What a run leaves in the database, ids replaced by paths (the commit order aside)."""
    conn = store.db.conn
    q = lambda sql: [tuple(r) for r in conn.execute(sql).fetchall()]  # noqa: E731
    return {
        "files": q("SELECT path, size, mtime, sha256, recorded_at, status, error_kind, error, "
                   "mode, flagged, superseded, analysed_at, notes, extra FROM files ORDER BY path"),
        "measures": q("SELECT f.path, m.channel, m.name, m.value, m.unit, m.kind, m.json, "
                      "m.flagged FROM measures m JOIN files f ON f.id = m.file_id "
                      "ORDER BY f.path, m.channel, m.name"),
        "spectra": q("SELECT f.path, s.channel, s.unit, s.freqs, s.density FROM spectra s "
                     "JOIN files f ON f.id = s.file_id ORDER BY f.path, s.channel"),
        "findings": q("SELECT f.path, g.* FROM findings g JOIN files f ON f.id = g.file_id "
                      "ORDER BY f.path, g.channel, g.measure, g.rule"),
        "alerts": q("SELECT * FROM alerts ORDER BY key"),
        "outbox": q("SELECT alert_key, transition, kind, priority, rig, title, body, status, "
                    "created_at FROM outbox ORDER BY id"),
    }


def _commit_order(store: Store) -> list[str]:
    return [r[0] for r in store.db.conn.execute("SELECT path FROM files ORDER BY id")]


def _strip_ids(rows: dict[str, list[tuple]]) -> dict[str, list[tuple]]:
    # findings rows carry their own id and file_id (position 1 and 2 after the path)
    out = dict(rows)
    out["findings"] = [(r[0],) + r[3:] for r in rows["findings"]]
    return out


@pytest.fixture(scope="module")
def inline(archive, rules, tmp_path_factory):
    """The archive stored by ``qcd scan --store`` in this process: the reference run."""
    folder, paths = archive
    rig = RigConfig(name=RIG, folders=(folder,), mains_hz=50.0)
    db = tmp_path_factory.mktemp("inline") / "qcd.sqlite"
    with Store(db) as store:
        res = scan(sorted(paths), rig, store, rules, clock=_clock())
        assert res.count == N_FILES
        return _strip_ids(_dump(store)), _commit_order(store)


@pytest.mark.slow
@on_cluster
def test_cluster_stores_the_same_rows_alerts_and_outbox_as_inline_and_workers(
        archive, rig, rules, client, inline, tmp_path):
    folder, paths = archive
    reference, order = inline
    # recording order (the mtimes), not the name order the files were given in
    assert order == [os.fspath(p) for p in paths]
    kinds = {r[0]: r[6] for r in reference["files"]}
    for i, kind in CORRUPT.items():                         # each bad file with its reason
        assert kinds[os.fspath(paths[i])] == kind
    assert sum(k is None for k in kinds.values()) == N_FILES - len(CORRUPT)
    assert any("hum_rms" in r[0] for r in reference["alerts"])       # the faulty files opened one
    assert [r[2] for r in reference["outbox"]] == ["digest"]         # a backlog: one digest

    with Store(tmp_path / "workers.sqlite") as store:
        scan(sorted(paths), rig, store, rules, clock=_clock(), workers=2)
        assert _strip_ids(_dump(store)) == reference
    with Store(tmp_path / "cluster.sqlite") as store:
        res = cluster.backfill(sorted(paths), rig, store, rules, client=client, clock=_clock())
        assert res.count == N_FILES and res.files == []      # only the errors are kept
        assert sorted(fm.error_kind for fm in res.failed) == sorted(CORRUPT.values())
        assert _strip_ids(_dump(store)) == reference
        assert _commit_order(store) == order                 # committed in recording order


def _slow_first(client_path: str, path: str, rig: RigConfig, log: str, slow: str):
    """The real measuring task, with one file held back and each completion logged."""
    if os.path.basename(path) == slow:
        time.sleep(1.5)
    fm = cluster.measure_task(client_path, path, rig)
    with open(log, "a") as f:
        f.write(os.path.basename(path) + "\n")
    return fm


@pytest.mark.slow
@on_cluster
def test_files_measured_out_of_order_are_committed_in_recording_order(archive, rig, client,
                                                                        tmp_path):
    folder, paths = archive
    client.wait_for_workers(2, timeout=120)                 # one is held back, one goes on
    files = [p for i, p in enumerate(paths[:12]) if i not in CORRUPT]
    log = tmp_path / "completed.txt"
    task = lambda c, p, r: _slow_first(c, p, r, os.fspath(log), files[0].name)  # noqa: E731
    got = [Path(fm.path).name for fm in cluster.measure_on(client, files, rig, window=8,
                                                            task=task)]
    completed = log.read_text().split()
    assert sorted(completed) == sorted(f.name for f in files)
    assert completed[0] != files[0].name                    # the first file finished later
    assert got == [f.name for f in files]                   # yet came out first


@pytest.mark.slow
@on_cluster
def test_a_worker_killed_mid_run_loses_and_doubles_no_file(archive, rig, rules, client,
                                                           inline, tmp_path):
    folder, paths = archive
    pids = client.run(os.getpid)                            # the fixture's worker processes
    killed: list[int] = []

    def on_file(fm) -> None:
        if len(killed) == 0 and on_file.n == 10:
            pid = next(iter(pids.values()))
            os.kill(pid, signal.SIGKILL)
            killed.append(pid)
        on_file.n += 1
    on_file.n = 0
    with Store(tmp_path / "qcd.sqlite") as store:
        cluster.backfill(sorted(paths), rig, store, rules, client=client, clock=_clock(),
                         on_file=on_file, window=8)
        rows = _strip_ids(_dump(store))
    assert killed
    assert rows == inline[0]                                # every file once, same as inline


def _kill_tree(proc: subprocess.Popen) -> None:
    import psutil
    try:
        kids = psutil.Process(proc.pid).children(recursive=True)
    except psutil.NoSuchProcess:
        kids = []
    proc.kill()
    proc.wait(30)
    for k in kids:                                          # the LocalCluster it started
        try:
            k.kill()
        except psutil.NoSuchProcess:
            pass
    psutil.wait_procs(kids, timeout=30)


@pytest.mark.slow
@on_cluster
def test_client_killed_and_rerun_stores_every_file_exactly_once(archive, rig, rules, client,
                                                                inline, tmp_path):
    folder, paths = archive
    db = tmp_path / "qcd.sqlite"
    cfg = tmp_path / "qcd.toml"
    cfg.write_text(textwrap.dedent(f"""
        database = "{db}"
        [[rig]]
        name = "{RIG}"
        folders = ["{folder}"]
        mains_hz = 50
    """))
    env = dict(os.environ, PYTHONPATH=os.fspath(ROOT))
    proc = subprocess.Popen([sys.executable, "-m", "qcd", "scan", "--store", "--rig", RIG,
                             "--config", os.fspath(cfg), "--cluster", "local:2",
                             os.fspath(folder)], env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT)
    stored = 0
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and proc.poll() is None:
            if db.exists():
                try:
                    with sqlite3.connect(db, timeout=5) as conn:
                        stored = conn.execute("SELECT count(*) FROM files").fetchone()[0]
                except sqlite3.OperationalError:     # the schema is still being made
                    stored = 0
                if stored >= 5:
                    break
            time.sleep(0.02)
    finally:
        _kill_tree(proc)
        proc.stdout.close()
    assert 5 <= stored < N_FILES, f"the client was not killed mid-run ({stored} stored)"

    with Store(db) as store:
        first = store.db.conn.execute("SELECT count(*) FROM files").fetchone()[0]
        todo, skipped = cluster.pending(sorted(paths), rig, store)
        assert skipped == first and len(todo) == N_FILES - first    # continues where it stopped
        res = cluster.backfill(sorted(paths), rig, store, rules, client=client, clock=_clock())
        assert res.count == N_FILES - first
        rows = _dump(store)
        order = _commit_order(store)
    assert order == inline[1]                               # each file once, in recording order
    assert [r[10] for r in rows["files"]] == [0] * N_FILES  # nothing superseded
    ref = inline[0]
    # same files and statuses, same alerts and one digest (the times are another run's)
    assert [r[:7] for r in rows["files"]] == [r[:7] for r in ref["files"]]
    assert [(r[0], r[1], r[2], r[3]) for r in rows["measures"]] == \
        [(r[0], r[1], r[2], r[3]) for r in ref["measures"]]
    assert [(r[0], r[6]) for r in rows["alerts"]] == [(r[0], r[6]) for r in ref["alerts"]]
    assert [r[:3] for r in rows["outbox"]] == [r[:3] for r in ref["outbox"]]


def _dies_on(client_path: str, path: str, rig: RigConfig, poison: str):
    """The real measuring task, except that the worker process dies on one file."""
    if os.path.basename(path) == poison:
        os._exit(1)
    return cluster.measure_task(client_path, path, rig)


@pytest.mark.slow
@on_cluster
def test_a_file_that_kills_its_worker_is_retried_then_stored_as_an_error(archive, rig, rules,
                                                                         client, tmp_path):
    folder, paths = archive
    files = [p for i, p in enumerate(paths[:6]) if i not in CORRUPT]
    poison = files[2].name
    task = lambda c, p, r: _dies_on(c, p, r, poison)  # noqa: E731
    with Store(tmp_path / "qcd.sqlite") as store:
        # one file in flight at a time: the engine's count of deaths falls on that file alone
        res = cluster.backfill(files, rig, store, rules, client=client, clock=_clock(),
                               window=1, task=task)
        (bad,) = res.failed
        assert bad.path == os.fspath(files[2]) and bad.error_kind == "internal"
        assert "died 2 times" in bad.error and "tcp://" in bad.error
        assert res.count == len(files)
        # a rerun measures it again (a worker death is not the file's verdict); the rest stay
        todo, skipped = cluster.pending(files, rig, store)
        assert todo == [os.fspath(files[2])] and skipped == len(files) - 1


@pytest.mark.slow
@on_cluster
def test_a_worker_that_cannot_open_a_file_says_which_worker_and_why(archive, rig, rules, client,
                                                                     tmp_path):
    folder, paths = archive
    missing = tmp_path / "not-mounted"
    with Store(tmp_path / "qcd.sqlite") as store:
        res = cluster.backfill(paths[:2], rig, store, rules, client=client, clock=_clock(),
                               path_map=cluster.parse_path_map([f"{folder}={missing}"]))
        assert [fm.error_kind for fm in res.failed] == ["unreadable", "unreadable"]
        err = res.failed[0].error
        assert err.startswith(os.fspath(paths[0]))          # stored under the client's path
        assert "worker tcp://" in err and os.fspath(missing) in err
        assert "No such file" in err


def test_cluster_addresses_and_path_maps_are_checked():
    assert cluster.parse_target("local:3") == cluster.Target(None, 3)
    assert cluster.parse_target("tcp://sched.example:8786").address == "tcp://sched.example:8786"
    for bad in ("local", "local:0", "sched.example", "tcp://sched.example"):
        with pytest.raises(ConfigError, match="--cluster"):
            cluster.parse_target(bad)
    with pytest.raises(ConfigError, match="--path-map"):
        cluster.parse_path_map(["/data"])
    pm = cluster.parse_path_map(["/data=/mnt/archive", "/data/rig2=/mnt/rig2",
                                 "D:\\rigs=/mnt/rigs"])
    assert cluster.worker_path("/data/rig1/a.abf", pm) == "/mnt/archive/rig1/a.abf"
    assert cluster.worker_path("/data/rig2/a.abf", pm) == "/mnt/rig2/a.abf"   # longest prefix
    assert cluster.worker_path("D:\\rigs\\r1\\a.abf", pm) == "/mnt/rigs/r1/a.abf"
    assert cluster.worker_path("/database/a.abf", pm) == "/database/a.abf"   # not a prefix


def test_progress_says_done_total_rate_eta_and_errors(tmp_path):
    import io
    from qcd.pipeline import error_file
    from qcd.results import FileMeasures
    t = [100.0]
    out = io.StringIO()
    p = cluster.Progress(4, out=out, every_s=10.0, clock=lambda: t[0])
    t[0] = 102.0
    p(FileMeasures(path="a.abf", status="ok"))
    t[0] = 104.0
    p(error_file("b.abf", "truncated", "b.abf: cut short"))
    assert p.line() == "backfill: 2/4 files, 0.5 files/s, ETA 4s, 1 error"
    assert "error  b.abf  (truncated): b.abf: cut short" in out.getvalue()


@pytest.mark.slow
@on_cluster
def test_a_batch_with_a_file_that_kills_its_worker_is_sent_again_one_file_at_a_time(
        archive, rig, client):
    folder, paths = archive
    files = paths[:4]                                       # none of them corrupt
    poison = files[1].name
    task = lambda c, p, r: _dies_on(c, p, r, poison)  # noqa: E731
    # one task of 4 files dies twice (the fixture's attempts), then each file goes alone
    got = list(cluster.measure_on(client, files, rig, per_task=4, window=4, task=task))
    assert [fm.path for fm in got] == [os.fspath(p) for p in files]
    assert [fm.status for fm in got] == ["ok", "error", "ok", "ok"]
    assert got[1].error_kind == "internal" and "died 2 times" in got[1].error


def test_cluster_options_need_store_and_cluster(tmp_path, capsys):
    from qcd.cli import main
    (tmp_path / "a.abf").write_bytes(b"")
    assert main(["scan", "--cluster", "local:2", str(tmp_path)]) == 2
    assert "--cluster: needs --store" in capsys.readouterr().err
    assert main(["scan", "--store", "--rig", "r", "--path-map", "/a=/b", str(tmp_path)]) == 2
    assert "--path-map: needs --cluster" in capsys.readouterr().err


def test_without_the_extra_cluster_says_which_extra_to_install(tmp_path):
    folder = tmp_path / "data"
    folder.mkdir()
    cfg = tmp_path / "qcd.toml"
    cfg.write_text(f'database = "{tmp_path / "qcd.sqlite"}"\n[[rig]]\nname = "r"\n'
                   f'folders = ["{folder}"]\n')
    # Python's import system refuses a module whose sys.modules entry is None: as if the extra
    # were not installed
    code = ("import sys; sys.modules['distributed'] = None; from qcd.cli import main; "
            f"sys.exit(main(['scan', '--store', '--rig', 'r', '--config', {str(cfg)!r}, "
            f"'--cluster', 'local:1', {str(folder)!r}]))")
    got = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=60, env=dict(os.environ, PYTHONPATH=os.fspath(ROOT)))
    assert got.returncode == 1, got.stderr
    assert "pip install 'qcd-ephys[cluster]'" in got.stderr
    assert "Traceback" not in got.stderr


@pytest.mark.slow
@on_cluster
def test_the_workers_read_the_headers_for_the_same_recording_order(archive, rig, client,
                                                                     store):
    folder, paths = archive
    here, _ = cluster.pending(sorted(paths), rig, store)
    there, _ = cluster.pending(sorted(paths), rig, store, client=client)
    assert here == there == [os.fspath(p) for p in paths]      # the mtimes' order
