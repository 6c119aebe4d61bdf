"""Runs tests/bench/bench_design.py at tiny size so CI exercises it.

Only that it runs is checked; the speed figures of a tiny run mean nothing
and speed is never asserted in a unit test.
"""

import importlib.util
import pathlib

import pytest

BENCH = pathlib.Path(__file__).resolve().parents[1] / "bench" / "bench_design.py"


def test_bench_design_runs_at_tiny_size(capsys):
    pytest.importorskip("sklearn")
    spec = importlib.util.spec_from_file_location("bench_design", BENCH)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    assert mod.main(["--tiny"]) == 0
    out = capsys.readouterr().out
    assert "speed ratio KMeans / ours" in out
    assert "int16 table vs searchsorted" in out
    assert "hot path" in out
