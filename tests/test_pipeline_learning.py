"""The learning rows remembered within a group of files (Store.learning_points): the same
rows as the plain query after every kind of write, and the same judgement with and without.

References outside qcd: the rows are checked against the store's own SQL query run afresh
(``flagged_points``) on the same real SQLite file; the judged results of a group commit
against one transaction per file, on the demo lab's recordings (real ABF files written with
pyabf, measured by qcd). Invented data (the demo's) only as input.
"""
from __future__ import annotations

import re
import sqlite3
from dataclasses import replace
from datetime import datetime, timezone
from pathlib import Path

import pytest

from qcd import demo, pipeline
from qcd.config import load_config
from qcd.results import ChannelMeasures, FileMeasures, Measure
from qcd.ruleset import load_rules
from qcd.store import Store

RIG = "rig-a"


def _fm(i: int, at: float, value: float, *, path: str | None = None, mode: str = "vc",
        sha: str | None = None) -> FileMeasures:
    ch = ChannelMeasures(index=0, name="IN0", unit="pA", dimension="A",
                         measures={"noise_rms": Measure("noise_rms", value, "pA")})
    return FileMeasures(path=path or f"/data/f{i:04d}.abf", status="ok", size=100 + i,
                        mtime=at, sha256=sha or f"{i:064x}", mode=mode,
                        recorded_at=datetime.fromtimestamp(at, timezone.utc), channels=(ch,))


def _fresh(store: Store, start: float | None, before: float, limit: int) -> list[tuple]:
    return store.flagged_points(RIG, "vc", 0, "noise_rms",
                                after=None if start is None else start - 1e-6,
                                before=before, limit=limit)


def _check(store: Store, start: float | None, before: float, limit: int) -> list[tuple]:
    got = store.learning_points(RIG, "vc", 0, "noise_rms", start=start, before=before,
                                limit=limit)
    assert got == _fresh(store, start, before, limit), (start, before, limit)
    return got


def test_remembered_rows_equal_the_query_after_each_kind_of_write(store):
    t0 = 1.7e9
    with store.transaction():
        for i in range(12):                           # files arriving in recording order
            _check(store, None, t0 + i * 60 + 1, 400)
            _check(store, t0 + 120, t0 + i * 60 + 1, 5)    # a start, and a limit reached
            store.commit_file(RIG, _fm(i, t0 + i * 60, 10.0 + i), analysed_at=t0 + 1e5)
        assert len(_check(store, None, t0 + 12 * 60, 400)) == 12
        # a backlog file recorded before the rows remembered: it joins them
        store.commit_file(RIG, _fm(100, t0 + 30, 99.0), analysed_at=t0 + 1e5)
        assert (t0 + 30, 99.0, 0) in _check(store, None, t0 + 12 * 60, 400)
        _check(store, t0 + 120, t0 + 12 * 60, 5)
        # an earlier cut of the remembered rows
        assert len(_check(store, None, t0 + 5 * 60, 400)) == 6
        # the same path measured again with new content: its old row leaves
        store.commit_file(RIG, _fm(3, t0 + 3 * 60, 55.0, sha="ab" * 32),
                          analysed_at=t0 + 1e5)
        rows = _check(store, None, t0 + 12 * 60, 400)
        assert (t0 + 180, 13.0, 0) not in rows and (t0 + 180, 55.0, 0) in rows
        # a file of another mode changes nothing here; an error file adds no row
        store.commit_file(RIG, _fm(200, t0 + 11, 1.0, mode="cc"), analysed_at=t0 + 1e5)
        store.commit_file(RIG, replace(_fm(201, t0 + 12, 1.0), status="error",
                                       error="x", error_kind="internal", channels=()),
                          analysed_at=t0 + 1e5)
        _check(store, None, t0 + 13 * 60, 400)
    # a group that fails leaves nothing remembered: the next group reads what is stored
    with pytest.raises(RuntimeError):
        with store.transaction():
            store.commit_file(RIG, _fm(300, t0 + 20 * 60, 77.0), analysed_at=t0 + 1e5)
            assert (t0 + 1200, 77.0, 0) in _check(store, None, t0 + 21 * 60, 400)
            raise RuntimeError("the group fails")
    with store.transaction():
        assert (t0 + 1200, 77.0, 0) not in _check(store, None, t0 + 21 * 60, 400)


@pytest.fixture(scope="module")
def demo_files(tmp_path_factory):
    """The demo lab's recordings (7 days, 3 a day, 4 rigs), each measured once."""
    folder = tmp_path_factory.mktemp("lab")
    plan = demo.plan_lab(7, 3, end=datetime(2026, 11, 20, tzinfo=timezone.utc))
    paths = demo.build_lab(folder / "files", plan, workers=2)
    (folder / "qcd.toml").write_text(demo.demo_config_text(folder), encoding="utf-8")
    config = load_config(folder / "qcd.toml")
    rigs = {r.name: r for r in config.rigs}
    measured = [(rigs[spec.rig], pipeline.measure(p, rigs[spec.rig]))
                for spec, p in zip(plan.files, paths)]
    measured.sort(key=lambda x: (x[1].recorded_at, x[1].path))
    return load_rules(config.rules), measured


def _judged(db: Path) -> dict[str, list]:
    """Everything the judge and the alerts wrote, by file path (ids differ between stores)."""
    with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as conn:
        q = lambda sql: sorted(tuple("" if x is None else x for x in r)
                               for r in conn.execute(sql).fetchall())
        return {
            "files": q("SELECT path, status, flagged, recorded_at FROM files"),
            "measures": q("SELECT f.path, m.channel, m.name, m.flagged FROM measures m "
                          "JOIN files f ON f.id = m.file_id"),
            "findings": q("SELECT f.path, g.channel, g.measure, g.rule, g.kind, g.bad, "
                          "g.severity, g.value, g.limit_text, g.hint FROM findings g "
                          "JOIN files f ON f.id = g.file_id"),
            "alerts": q("SELECT key, state, state_json, opened_at, resolved_at FROM alerts"),
            "charts": q("SELECT rig, mode, channel, measure, rule, start_at, state_json, "
                        "ref_json FROM charts"),
            "outbox": q("SELECT kind, title, body FROM outbox"),
        }


@pytest.mark.slow
def test_a_group_commit_judges_as_one_transaction_per_file_does(demo_files, tmp_path):
    rules, measured = demo_files
    dbs = {}
    for how in ("one by one", "in groups"):
        db = tmp_path / f"{how.replace(' ', '_')}.sqlite"
        with Store(db) as store:
            delta = []                      # the remembered rows' top-up query, when it runs
            store.db.conn.set_trace_callback(      # (sqlite3 passes the SQL with its values)
                lambda sql: delta.append(1) if re.search(
                    r"f\.recorded_at >= \S+ AND f\.recorded_at < ", sql) else None)
            step = 1 if how == "one by one" else 16
            for i in range(0, len(measured), step):
                with store.transaction():
                    for rig, fm in measured[i:i + step]:
                        at = fm.recorded_at.timestamp() + 600.0
                        pipeline.commit(fm, rig, store, rules, at)
            store.db.conn.set_trace_callback(None)
        assert (len(delta) > 0) == (how == "in groups"), (how, len(delta))
        dbs[how] = _judged(db)
    one, grouped = dbs["one by one"], dbs["in groups"]
    assert len(one["files"]) == len(measured)
    assert any(r[5] for r in one["findings"]) and one["alerts"] and one["charts"]
    for table in one:
        assert grouped[table] == one[table], table
