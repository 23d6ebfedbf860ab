"""The package's import structure: no cycles, no imports into a higher layer.

The graph is drawn from the source with :mod:`ast` by ``tools/import_graph.py``
(every import counts, also inside functions).  Common practice, no source: a layered
package imports only downward, so each layer can be read, tested and replaced
without the ones above it.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def tool():
    spec = importlib.util.spec_from_file_location(
        "import_graph", ROOT / "tools" / "import_graph.py"
    )
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def graph(tool):
    return tool.import_graph(ROOT)


def test_the_tool_finds_a_cycle_and_an_upward_import(tool):
    # The check itself must be able to fail: a made-up graph with both faults.
    fake = {
        "schedforge.analysis": {"schedforge.report": True},
        "schedforge.report": {"schedforge.analysis": False},
    }
    assert tool.cycles(fake) == [["schedforge.analysis", "schedforge.report"]]
    assert tool.upward_imports(fake) == [("schedforge.analysis", "schedforge.report", True)]


def test_every_module_has_a_layer(tool, graph):
    assert [m for m in graph if m != tool.PACKAGE and tool.layer_of(m) is None] == []


def test_no_import_cycle(tool, graph):
    assert tool.cycles(graph) == []


def test_every_import_points_down(tool, graph):
    assert tool.upward_imports(graph) == []
