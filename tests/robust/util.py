"""Helpers shared by the robustness modules (tests/robust/).

Most cases run the command in-process through ``streamq.cli.main(argv)`` with
pytest's capsys, so hypothesis can try hundreds of them quickly; a few go
through a real subprocess (``conftest.cli``) to see what a user sees.
"""

from __future__ import annotations

import csv
import datetime
import json
import math
import os
import re
from pathlib import Path
from typing import Any

import soundfile as sf

from hypothesis import HealthCheck, settings

from streamq.cli import main

#: multiplies every hypothesis example count in this suite (long runs: 10 or more)
SCALE = float(os.environ.get("STREAMQ_ROBUST_EXAMPLES", "1"))


def examples(n: int) -> int:
    return max(1, int(round(n * SCALE)))


def fuzz_settings(n: int, **kw) -> settings:
    """Hypothesis settings for a case that runs the command: no deadline (the
    machine is shared), no example database (cases are cheap to regenerate)."""
    return settings(max_examples=examples(n), deadline=None, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                           HealthCheck.function_scoped_fixture,
                                           HealthCheck.filter_too_much], **kw)


# -- running the command in-process ---------------------------------------------------

class Outcome:
    """Exit status and output of one in-process ``streamq`` command."""

    def __init__(self, code: int, out: str, err: str):
        self.code, self.out, self.err = code, out, err

    @property
    def lines(self) -> list[str]:
        return [line for line in self.err.splitlines() if line.strip()]

    def __repr__(self) -> str:
        return f"exit {self.code}\nstdout: {self.out[-2000:]}\nstderr: {self.err[-2000:]}"


def run_cli(capsys, *argv: str | Path) -> Outcome:
    """``streamq ARGV`` in this process. SystemExit (argparse) counts as an exit
    status; any other exception escapes and fails the test (it would be a
    traceback for the user)."""
    capsys.readouterr()
    try:
        code = main([str(a) for a in argv])
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 2)
    cap = capsys.readouterr()
    return Outcome(code, cap.out, cap.err)


def assert_clean(res: Outcome, *parts: str, n_lines: int | None = 1) -> list[str]:
    """Exit 2, no traceback, every stderr line 'streamq: ...' naming ``parts``
    (each part in at least one line; all of them in the line when n_lines == 1)."""
    assert res.code == 2, res
    assert "Traceback" not in res.err and "Traceback" not in res.out, res
    lines = res.lines
    assert lines, res
    for line in lines:
        assert line.startswith("streamq: "), res
    if n_lines is not None:
        assert len(lines) == n_lines, res
    for part in parts:
        assert any(part in line for line in lines), (part, res)
    return [line[len("streamq: "):] for line in lines]


def leftovers(folder: Path) -> list[Path]:
    """Temporary files a run must not leave behind (.NAME.part, .report.json.tmp)."""
    folder = Path(folder)
    if not folder.exists():
        return []
    return sorted(p for p in folder.rglob(".*") if p.name.endswith((".part", ".tmp")))


def assert_outputs_valid(out: Path) -> dict | None:
    """Whatever a run left in ``out`` is whole: no temporary files; every audio
    file reads to its end; every CSV file parses (a header, then rows of as many
    numbers or blanks); report.json (if any) parses and agrees with the files."""
    out = Path(out)
    assert leftovers(out) == [], leftovers(out)
    if not out.exists():
        return None
    for p in out.rglob("*"):
        if p.suffix.lower() in (".wav", ".flac", ".aiff", ".w64", ".caf", ".ogg"):
            with sf.SoundFile(str(p)) as f:
                data = f.read(dtype="float64", always_2d=True)
                assert data.shape[0] == f.frames, p
        elif p.suffix.lower() == ".csv":
            assert_csv_whole(p)
    rep = out / "report.json"
    if rep.exists():
        report = json.loads(rep.read_text())
        for nid, o in report.get("outputs", {}).items():
            path = Path(o.get("path", ""))
            if path.suffix.lower() in (".wav", ".flac") and path.exists():
                assert sf.info(str(path)).frames == o["frames"], nid
        for nid, m in report.get("meters", {}).items():
            for key in ("series_csv", "spectrum_csv"):
                if m.get(key):
                    assert (out / m[key]).is_file(), (nid, key)
        return report
    return None


def assert_csv_whole(path: Path) -> None:
    """A CSV file the meter writes: a header row, then rows of as many fields,
    each a number or blank (a file cut short mid-row fails here)."""
    with open(path, newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    assert rows and rows[0], path
    width = len(rows[0])
    for i, row in enumerate(rows[1:], 2):
        assert len(row) == width, (path, i, row)
        for v in row:
            if v:
                float(v)


# -- a tiny TOML writer (tomllib only reads) -----------------------------------------

_BARE = re.compile(r"^[A-Za-z0-9_-]+$")


def toml_key(k: str) -> str:
    return k if _BARE.match(k) else toml_str(k)


def toml_str(s: str) -> str:
    out = []
    for ch in s:
        o = ord(ch)
        if ch in '"\\':
            out.append("\\" + ch)
        elif o < 0x20 or o == 0x7F:
            out.append(f"\\u{o:04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return toml_str(v)
    if isinstance(v, (datetime.date, datetime.time, datetime.datetime)):
        return v.isoformat()
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{toml_key(k)} = {toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(type(v))


def dump_graph(raw: dict[str, Any]) -> str:
    """A graph dict as TOML: [graph], then [nodes.<id>] tables, in dict order.
    Non-table values under 'nodes' (a mutation may put them there) go inline."""
    lines = []
    for top, value in raw.items():
        if top == "nodes" and isinstance(value, dict):
            plain = {k: v for k, v in value.items() if not isinstance(v, dict)}
            if plain:
                lines.append("[nodes]")
                lines += [f"{toml_key(k)} = {toml_value(v)}" for k, v in plain.items()]
            for nid, table in value.items():
                if isinstance(table, dict):
                    lines.append(f"[nodes.{toml_key(nid)}]")
                    lines += [f"{toml_key(k)} = {toml_value(v)}" for k, v in table.items()]
        elif isinstance(value, dict):
            lines.append(f"[{toml_key(top)}]")
            lines += [f"{toml_key(k)} = {toml_value(v)}" for k, v in value.items()]
        else:
            lines.insert(0, f"{toml_key(top)} = {toml_value(value)}")
    return "\n".join(lines) + "\n"
