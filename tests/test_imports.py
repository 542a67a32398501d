"""Imports point down the flow (tests/import_graph.py prints the graph): no cycles, the store
does not know how files are measured, and measures/ stands on numpy and scipy alone."""
from __future__ import annotations

import pytest

import import_graph

GRAPH = import_graph.graph()


def test_every_import_points_down_the_flow():
    assert import_graph.problems(GRAPH) == []


def test_there_are_no_import_cycles():
    assert import_graph.cycles(GRAPH) == []


def test_the_store_does_not_import_analyze():
    assert "analyze" not in GRAPH["store"]
    assert set(GRAPH["store"]) <= {"errors", "results", "alerts", "judge", "codec", "schema"}
    # the schema and the stored-value encoding stand on sqlite-utils, numpy and errors alone
    assert set(GRAPH["schema"]) <= {"codec"}
    assert set(GRAPH["codec"]) <= {"errors"}


@pytest.mark.parametrize("module", sorted(m for m in GRAPH if m.startswith("measures")))
def test_measures_import_nothing_from_qcd_above_them(module):
    assert all(t.startswith("measures") for t in GRAPH[module]), GRAPH[module]


def test_results_and_html_stand_low():
    assert set(GRAPH["results"]) <= {"units"}
    assert GRAPH["html"] == {}


def test_the_checker_sees_an_upward_import():
    # the check itself must be able to fail: a store importing analyze is flagged
    g = {m: dict(d) for m, d in GRAPH.items()}
    g["store"]["analyze"] = "'"
    assert "store -> analyze: points up the flow" in import_graph.problems(g)
    g["analyze"]["store"] = ""
    assert import_graph.cycles(g)


def test_a_one_file_scan_loads_only_what_measuring_needs(tmp_path):
    # start-up of `qcd scan FILE` (and of every worker): judging, the drift charts (scipy.stats
    # through runlength), alerts, the store, watchdog and the process pool are for the
    # service and `scan --store`; measuring a gap-free file needs none of them
    import struct
    import subprocess
    import sys
    from pathlib import Path

    import numpy as np
    import pyabf.abfWriter

    path = tmp_path / "gapfree.abf"
    pyabf.abfWriter.writeABF1(np.random.default_rng(0).normal(0, 5, (1, 40_000)), str(path),
                              10_000.0, "pA")
    with open(path, "r+b") as f:
        f.seek(8)
        f.write(struct.pack("<h", 3))                  # nOperationMode 3: gap-free
    code = ("import sys\nfrom qcd.cli import main\ntry:\n    main(sys.argv[1:])\n"
            "except SystemExit:\n    pass\nprint(' '.join(sorted(sys.modules)))")
    root = Path(__file__).resolve().parents[1]
    proc = subprocess.run([sys.executable, "-c", code, "scan", "--json", str(path)],
                          capture_output=True, text=True, cwd=root, timeout=120)
    lines = proc.stdout.strip().split("\n")
    assert '"status": "ok"' in lines[0], proc.stdout + proc.stderr
    loaded = set(lines[-1].split())
    assert {"qcd.analyze", "qcd.pipeline"} <= loaded
    unused = {"qcd.judge", "qcd.alerts", "qcd.charts", "qcd.history", "qcd.runlength",
              "qcd.store", "qcd.notify", "scipy.stats", "scipy.optimize", "watchdog",
              "concurrent.futures.process", "sqlite_utils", "apprise", "matplotlib",
              "numpy.ma", "numpy.polynomial", "statistics", "tomllib", "difflib"}
    assert not unused & loaded, unused & loaded
