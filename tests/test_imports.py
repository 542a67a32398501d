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
