"""Coverage-guided fuzzing of the index-file reader with atheris (optional; pytest
does not collect this file, and atheris is not a project dependency).

Run, for example::

    /work/venv/bin/pip install atheris
    /work/venv/bin/python tests/fuzz_indexfile.py /tmp/sqi-corpus -max_total_time=300

An empty or missing corpus folder is seeded with a small valid file. Half of the
mutations get their CRCs recomputed afterwards, so the fuzzer also reaches the
checks behind the CRCs. A crash is any exception other than StreamqError, or a
broken invariant of what the reader returns (see ``exercise`` in
test_indexfile.py).
"""

from __future__ import annotations

import atexit
import os
import shutil
import sys
import tempfile
from pathlib import Path

import atheris

# import the heavy dependencies before instrumenting, so only our reader is instrumented
import numpy  # noqa: F401
import streamq.engine.blocks  # noqa: F401
import streamq.errors  # noqa: F401

with atheris.instrument_imports(include=["streamq.engine.indexio"]):
    import streamq.engine.indexio  # noqa: F401

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import test_indexfile as helpers  # noqa: E402

_WORK = Path(tempfile.mkdtemp(prefix="streamq-atheris-"))
_FILE = _WORK / "input.sqi"
atexit.register(shutil.rmtree, _WORK, True)


def test_one_input(data: bytes) -> None:
    if not data:
        return
    sizes = [1 + data[-1] * 3, 1 + (data[0] % 64)]  # read step sizes from the input itself
    _FILE.write_bytes(data)
    helpers.exercise(_FILE, sizes)


def custom_mutator(data: bytes, max_size: int, seed: int) -> bytes:
    data = atheris.Mutate(data, max_size)
    return helpers.fix_crcs(data) if seed % 2 else data


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("-")]
    if args:
        corpus = Path(args[0])
        corpus.mkdir(parents=True, exist_ok=True)
        if not any(corpus.iterdir()):
            (corpus / "seed.sqi").write_bytes(helpers.SEED)
    atheris.Setup(sys.argv, test_one_input, custom_mutator=custom_mutator)
    atheris.Fuzz()


if __name__ == "__main__":
    main()
