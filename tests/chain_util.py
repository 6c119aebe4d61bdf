"""Helpers for graph-level tests: build a graph from TOML text and run it."""

from __future__ import annotations

import json
from pathlib import Path

from streamq.engine.graph import parse_graph
from streamq.engine.scheduler import build, run_offline


def run_toml(text: str, out: Path, block: int | None = None, overrides=(), graph_dir: Path | None = None):
    """Run a graph given as TOML text into ``out``; returns report.json as a dict."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    src = (graph_dir or out) / "graph.toml"
    src.write_text(text)
    graph = parse_graph(text, src, list(overrides))
    built = build(graph, out)
    run_offline(built, block=block, handle_signals=False)
    return json.loads((out / "report.json").read_text())
