"""Soak test: the watch service under what labs' machines do, with kill -9 and restarts.

Writers in threads do an adversarial mix on one rig folder - whole copies, slow chunked writes,
stalls longer than the settle time, renames from temporary names, moves in from another folder,
deletions right after writing, overwrites, preallocated writes (final size first), names that
are not valid UTF-8 and some garbage files - while `qcd watch` runs in a subprocess that is
killed with SIGKILL at random and started again. Messages go to an HTTP sink on 127.0.0.1.
At the end the service catches up, and the store is checked against the truth on disk:

- every finished file stored exactly once (one current row per path) with its final content;
- no row holding a half-written or older content, PRAGMA integrity_check ok;
- no orphan worker process left after a kill;
- every queued message delivered (received by the sink), duplicates counted;
- the service's memory (RSS of the service and its workers) over the run.

    nice .venv/bin/python tests/benchmarks/soak.py [--minutes 5] [--writers 4] [--seed 1]

Not collected by pytest. Network only on 127.0.0.1; every wait is bounded.
"""
from __future__ import annotations

import argparse
import hashlib
import os
import random
import signal
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests"))

from sinks import HttpSink  # noqa: E402

SETTLE_S = 1.0
RIG = "soak"


def _abf_bytes(seed: int, n: int = 20000) -> bytes:
    """A distinct small ABF1 recording (pyabf's own writer), as bytes."""
    import pyabf.abfWriter
    rng = np.random.default_rng(seed)
    with tempfile.TemporaryDirectory() as d:
        p = os.path.join(d, "x.abf")
        pyabf.abfWriter.writeABF1(rng.normal(0.0, 5.0 + seed % 7, size=(1, n)).astype(np.float32),
                                  p, 10000.0, units="pA")
        return Path(p).read_bytes()


class Writers:
    """Threads doing random file operations; ``truth`` is what each path should end with."""

    def __init__(self, rig: Path, outside: Path, n: int, seed: int) -> None:
        self.rig, self.outside = rig, outside
        self.n = n
        self.rng = random.Random(seed)
        self.seq = 0
        self.lock = threading.Lock()
        self.stop = threading.Event()
        self.ops: Counter = Counter()
        self.threads = [threading.Thread(target=self._run, args=(i,), name=f"writer-{i}")
                        for i in range(n)]

    def start(self) -> None:
        for t in self.threads:
            t.start()

    def join(self) -> None:
        self.stop.set()
        for t in self.threads:
            t.join(120)

    def _next(self) -> int:
        with self.lock:
            self.seq += 1
            return self.seq

    def _name(self, k: int, rng: random.Random) -> bytes:
        if rng.random() < 0.08:
            return b"caf\xe9_%d.abf" % k                  # a legacy (Latin-1) encoded name
        return b"rec_%05d.abf" % k

    def _run(self, i: int) -> None:
        rng = random.Random(self.rng.random())
        mine: list[bytes] = []
        while not self.stop.is_set():
            k = self._next()
            op = rng.choice(["copy", "copy", "chunks", "stall", "rename", "move", "delete",
                             "overwrite", "prealloc", "garbage"])
            if op == "overwrite" and not mine:
                op = "copy"
            name = rng.choice(mine) if op == "overwrite" else self._name(k, rng)
            path = os.path.join(os.fsencode(self.rig), name)
            data = (os.urandom(rng.randint(2000, 40000)) if op == "garbage"
                    else _abf_bytes(k))
            try:
                self._do(op, path, data, rng)
            except OSError as e:                          # a full or odd disk: note and go on
                print(f"writer {i}: {op} failed: {e}", file=sys.stderr)
                continue
            self.ops[op] += 1
            if op != "delete" and name not in mine:
                mine.append(name)
            self.stop.wait(rng.uniform(0.05, 0.4))

    def _do(self, op: str, path: bytes, data: bytes, rng: random.Random) -> None:
        if op in ("copy", "overwrite", "garbage"):
            with open(path, "wb") as f:
                f.write(data)
        elif op == "chunks":
            with open(path, "wb") as f:
                for j in range(5):
                    f.write(data[j * len(data) // 5:(j + 1) * len(data) // 5])
                    f.flush()
                    time.sleep(0.2)
        elif op == "stall":                               # longer than the settle time
            with open(path, "wb") as f:
                f.write(data[:len(data) // 2])
                f.flush()
                time.sleep(SETTLE_S * 2.5)
                f.write(data[len(data) // 2:])
        elif op == "rename":
            tmp = path + b".part"
            with open(tmp, "wb") as f:
                f.write(data)
            os.rename(tmp, path)
        elif op == "move":
            src = os.path.join(os.fsencode(self.outside), os.path.basename(path))
            with open(src, "wb") as f:
                f.write(data)
            os.rename(src, path)
        elif op == "delete":
            with open(path, "wb") as f:
                f.write(data)
            time.sleep(rng.uniform(0.0, 0.3))
            os.unlink(path)
        elif op == "prealloc":                            # final size first, as copy tools do
            with open(path, "wb") as f:
                f.truncate(len(data))
                f.write(data[:8192])
                f.flush()
                time.sleep(SETTLE_S * 2.5)
                f.write(data[8192:])


def _rss_kb(pid: int) -> int:
    total = 0
    for p in [pid] + _children(pid):
        try:
            for line in Path(f"/proc/{p}/status").read_text().splitlines():
                if line.startswith("VmRSS:"):
                    total += int(line.split()[1])
        except OSError:
            pass
    return total


def _children(pid: int) -> list[int]:
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
    return state != "Z"


class Watch:
    def __init__(self, cfg: Path, log: Path) -> None:
        self._log = open(log, "ab")
        self.proc = subprocess.Popen([sys.executable, "-m", "qcd", "watch", "--config",
                                      os.fspath(cfg), "--workers", "2"],
                                     stdout=subprocess.DEVNULL, stderr=self._log)

    def kill9(self) -> list[int]:
        kids = _children(self.proc.pid)
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(30)
        self._log.close()
        return kids

    def term(self) -> int:
        self.proc.send_signal(signal.SIGTERM)
        try:
            return self.proc.wait(60)
        finally:
            self._log.close()


def _truth(rig: Path) -> dict[bytes, str]:
    out = {}
    for entry in os.scandir(os.fsencode(rig)):
        name = entry.name
        if entry.is_file() and name.endswith(b".abf") and not name.startswith(b"."):
            out[entry.path] = hashlib.sha256(Path(os.fsdecode(entry.path)).read_bytes()
                                             ).hexdigest()
    return out


def _rows(db: Path, sql: str) -> list[tuple]:
    with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=30) as conn:
        return conn.execute(sql).fetchall()


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--minutes", type=float, default=5.0)
    ap.add_argument("--writers", type=int, default=4)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--keep", type=Path, help="work in this folder and keep it")
    args = ap.parse_args()
    rnd = random.Random(args.seed)
    work = args.keep or Path(tempfile.mkdtemp(prefix="qcd-soak-"))
    work.mkdir(parents=True, exist_ok=True)
    rig, outside, dbdir = work / "rig", work / "outside", work / "db"
    for d in (rig, outside, dbdir):
        d.mkdir(exist_ok=True)
    sink = HttpSink().start()
    cfg = work / "qcd.toml"
    cfg.write_text(f'database = "db/qcd.sqlite"\nsettle_seconds = {SETTLE_S}\n'
                   f'give_up_hours = 1\nnotify = ["{sink.url}"]\n\n[[rig]]\nname = "{RIG}"\n'
                   f'folders = ["rig"]\n', encoding="utf-8")
    db = dbdir / "qcd.sqlite"
    writers = Writers(rig, outside, args.writers, args.seed)
    end = time.monotonic() + args.minutes * 60.0
    kills = orphans = 0
    rss: list[int] = []
    watch = Watch(cfg, work / "watch.err")
    writers.start()
    t0 = time.monotonic()
    try:
        next_kill = time.monotonic() + rnd.uniform(15, 45)
        while time.monotonic() < end:
            time.sleep(1.0)
            if watch.proc.poll() is not None:
                print(f"the service exited by itself with {watch.proc.returncode}",
                      file=sys.stderr)
                watch = Watch(cfg, work / "watch.err")
            rss.append(_rss_kb(watch.proc.pid))
            if time.monotonic() >= next_kill:
                kids = watch.kill9()
                kills += 1
                deadline = time.monotonic() + 10
                while any(_alive(k) for k in kids) and time.monotonic() < deadline:
                    time.sleep(0.1)
                orphans += sum(_alive(k) for k in kids)
                watch = Watch(cfg, work / "watch.err")
                next_kill = time.monotonic() + rnd.uniform(15, 45)
        writers.join()
        # catch up: until every file on disk has its row with its content (bounded)
        truth = _truth(rig)
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline:
            rows = _rows(db, "SELECT path, path_bytes, sha256 FROM files WHERE superseded = 0")
            stored = {(bytes(b) if b is not None else os.fsencode(p)): s for p, b, s in rows}
            if all(stored.get(p) == s for p, s in truth.items()):
                pend = _rows(db, "SELECT count(*) FROM outbox WHERE status != 'sent'")[0][0]
                if pend == 0:
                    break
            time.sleep(1.0)
        rss.append(_rss_kb(watch.proc.pid))
        code = watch.term()
    finally:
        if watch.proc.poll() is None:
            watch.kill9()
        sink.stop()
    took = time.monotonic() - t0
    rows = _rows(db, "SELECT path, path_bytes, sha256, size, status FROM files "
                     "WHERE superseded = 0")
    per_path: Counter = Counter()
    content: dict[bytes, tuple] = {}
    for p, b, s, size, status in rows:
        key = bytes(b) if b is not None else os.fsencode(p)
        per_path[key] += 1
        content[key] = (s, size, status)
    missing = [p for p in truth if p not in content]
    twice = [p for p, n in per_path.items() if n > 1]
    stale = [p for p, s in truth.items() if p in content and content[p][0] != s]
    half = [p for p in stale if content[p][1] != os.path.getsize(os.fsdecode(p))]
    integrity = _rows(db, "PRAGMA integrity_check")[0][0]
    outbox = _rows(db, "SELECT title, body, status FROM outbox")
    got = Counter((m.get("title"), m.get("message")) for m in sink.received)
    queued = Counter((t, b) for t, b, _ in outbox)
    lost = sum(max(0, n - got.get(k, 0)) for k, n in queued.items())
    dup = sum(max(0, got[k] - n) for k, n in queued.items())
    direct = sum(n for k, n in got.items() if k not in queued)   # "not being stored" alarms
    errors = sum(1 for v in content.values() if v[2] == "error")
    total_ops = sum(writers.ops.values())
    print(f"qcd soak: {args.minutes:g} min ({took:.0f} s with catch-up), {args.writers} "
          f"writers, {total_ops} file operations, {kills} kill -9 restarts")
    print("  operations: " + ", ".join(f"{k} {v}" for k, v in sorted(writers.ops.items())))
    print(f"  files on disk at the end: {len(truth)} ({errors} stored as errors: garbage "
          f"files)")
    print(f"  missing {len(missing)}, stored twice {len(twice)}, stale content {len(stale)}, "
          f"half-written {len(half)}; integrity_check: {integrity}")
    print(f"  orphan workers after kills: {orphans}")
    print(f"  messages: {len(outbox)} queued, {sum(got.values())} received, {lost} lost, "
          f"{dup} duplicate(s); {sum(1 for *_, s in outbox if s != 'sent')} not marked sent; "
          f"{direct} sent directly (storing-trouble alarms)")
    if rss:
        third = max(1, len(rss) // 3)
        print(f"  memory (service + workers RSS): first third max {max(rss[:third]) / 1024:.0f} "
              f"MB, last third max {max(rss[-third:]) / 1024:.0f} MB, overall max "
              f"{max(rss) / 1024:.0f} MB")
    print(f"  last stop: exit code {code}; work folder {work}")
    for p in (missing + stale)[:5]:
        print(f"  e.g. {'missing' if p in missing else 'stale'}: {os.fsdecode(p)!r}")
    bad = missing or twice or stale or orphans or lost or integrity != "ok"
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
