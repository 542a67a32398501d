"""Shared fixtures: the real recordings folder, a store, thread-leak and open-store guards.

Real recordings come from ../shared/data/abf/ beside the checkout or $QCD_ABF_DATA; without
them the tests that need them skip, unless QCD_REQUIRE_DATA=1 (CI), where they fail.
"""
from __future__ import annotations

import os
import threading
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

# Header times without a zone are read in the rig's zone, by default this computer's: the
# suite runs in UTC (worker processes inherit it) so its expected times do not depend on
# the machine it runs on. Tests of other zones name them.
os.environ["TZ"] = "UTC"
if hasattr(time, "tzset"):
    time.tzset()


def _abf_dir() -> Path:
    env = os.environ.get("QCD_ABF_DATA")
    return Path(env) if env else ROOT.parent / "shared" / "data" / "abf"


ABF_DIR = _abf_dir()
ABF_FILES = sorted(ABF_DIR.glob("*.abf")) if ABF_DIR.is_dir() else []


def require_data() -> Path:
    """The real-recordings folder, or skip (fail under QCD_REQUIRE_DATA=1) when absent."""
    if not ABF_FILES:
        msg = (f"real recordings not found in {ABF_DIR} (set QCD_ABF_DATA to the folder "
               f"holding the sample .abf files)")
        if os.environ.get("QCD_REQUIRE_DATA") == "1":
            pytest.fail(msg)
        pytest.skip(msg)
    return ABF_DIR


@pytest.fixture
def abf_dir() -> Path:
    return require_data()


def abf(name: str) -> Path:
    """Path of one real recording by its manifest name (skips when the folder is absent)."""
    require_data()
    path = ABF_DIR / name
    assert path.is_file(), f"{path} listed in MANIFEST.md but missing"
    return path


@pytest.fixture(autouse=True)
def no_leaked_threads():
    """Every test must stop the threads it started (observers, servers, senders)."""
    before = set(threading.enumerate())
    yield
    deadline = time.monotonic() + 5.0
    while True:
        extra = [t for t in threading.enumerate() if t not in before and t.is_alive()
                 and not t.daemon]
        if not extra or time.monotonic() > deadline:
            break
        time.sleep(0.05)
    assert not extra, f"threads left running: {[t.name for t in extra]}"


@pytest.fixture(autouse=True)
def every_store_closed(monkeypatch):
    """Every Store a test opens is closed by its end (an open one holds the database's WAL)."""
    from qcd.store import Store
    opened = []
    real_init = Store.__init__

    def init(self, *args, **kwargs):
        opened.append(self)
        real_init(self, *args, **kwargs)
    monkeypatch.setattr(Store, "__init__", init)
    yield
    left = [os.fspath(s.path) for s in opened if not getattr(s, "_closed", True)]
    assert not left, f"Store left open: {left}"


@pytest.fixture
def store(tmp_path):
    """An empty database in the test's folder (tmp_path/qcd.sqlite), closed afterwards."""
    from qcd.store import Store
    with Store(tmp_path / "qcd.sqlite") as s:
        yield s


# --- loopback notification sinks (tests/sinks.py) ----------------------------------------------

@pytest.fixture(scope="session")
def apprise_pools():
    """Start apprise's process-wide worker pools once, at full size, before any test snapshot.

    apprise 2.x sends through shared ThreadPoolExecutors that live for the whole process and
    grow on demand; filling them up front keeps the leaked-thread guard about the test's own
    threads.
    """
    import apprise.apprise as _ap
    import apprise.utils.http as _http
    for pool in (_ap.get_shared_executor(), _ap.get_coordinator_executor(), _http._DNS_POOL):
        n = pool._max_workers
        gate = threading.Barrier(n + 1)
        futures = [pool.submit(gate.wait, 10) for _ in range(n)]
        gate.wait(10)
        for f in futures:
            f.result(10)
    yield


@pytest.fixture
def http_sink(apprise_pools):
    """A JSON webhook on 127.0.0.1 recording what apprise posts (``.url`` is its apprise URL)."""
    from sinks import HttpSink
    sink = HttpSink().start()
    yield sink
    sink.stop()


@pytest.fixture
def smtp_sink(apprise_pools):
    """An SMTP server on 127.0.0.1 (aiosmtpd) recording the mails (``.url`` is a mailto URL)."""
    from sinks import SmtpSink
    sink = SmtpSink().start()
    yield sink
    sink.stop()
