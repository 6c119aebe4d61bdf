"""Every example graph in graphs/ is valid, and the offline ones run as shipped."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from streamq.cli import main

GRAPHS = sorted((Path(__file__).resolve().parents[1] / "graphs").glob("*.toml"))


@pytest.mark.parametrize("graph", GRAPHS, ids=lambda p: p.stem)
def test_example_graph_checks(graph, capsys):
    assert main(["check", str(graph)]) == 0
    assert "ok" in capsys.readouterr().out


@pytest.mark.parametrize("graph", [g for g in GRAPHS if "live" not in g.stem], ids=lambda p: p.stem)
def test_offline_example_graph_runs(graph, tmp_path):
    assert main(["run", str(graph), "--out", str(tmp_path), "--quiet"]) == 0
    report = json.loads((tmp_path / "report.json").read_text())
    assert report["complete"] is True
    for meter in report["meters"].values():
        assert meter["snr_db"] is not None and meter["snr_db"] > 0
