"""`streamq batch`: one graph over many recordings, one result table.

The graph's batch-input file-source (``[graph] batch_input``, or the graph's
only file-source) is bound to each input file in turn; each file runs into
its own folder under ``OUT/files/`` (report.json, batch.json, the meters' CSV
files, the graph's outputs and, with ``--pages``, the plots and report.html);
``OUT/summary.csv``, ``OUT/summary.json`` and the SNR plot (``OUT/summary.png``,
or ``OUT/summary-<meter>.png`` per meter when the graph has several) gather
the results. Files run on a local process pool (all cores by default) or on a
Dask cluster (``--cluster``); a re-run skips the files already done.
"""

from __future__ import annotations

import argparse
from pathlib import Path

HELP_EPILOG = """\
inputs: a folder (audio files below it, by extension), a glob pattern in quotes ('shows/**/*.flac'),
an audio file, or a text file listing one path per line; --inputs may be repeated.

Each file runs into OUT/files/<name>-<hash>/: report.json, batch.json (this file's batch record),
the meters' <meter>-series.csv and <meter>-spectrum.csv, the graph's outputs (sinks' relative
paths) and, with --pages, the plots and report.html that streamq run writes. OUT/summary.csv,
OUT/summary.json and OUT/summary.png (OUT/summary-<meter>.png per meter when the graph has
several) gather them; the all-files SNR is pooled (total signal over total noise energy, files
weighted by samples). A re-run skips files whose report is complete and whose input (size,
modification time) and setup (the graph file's text, --set values) are unchanged; with --pages
it also adds the plots and report.html to finished files that lack them, without running them
again.

--cluster tcp://HOST:PORT runs on a Dask scheduler there (its workers must see the graph, the
inputs and OUT at the same paths, and have streamq installed); --cluster local:N starts N local
Dask workers. Needs the optional extra: pip install 'streamq[cluster]'.

exit status: 0 every file done, 1 some files failed (listed, and in the summary), 2 bad graph,
inputs or options (or workers that cannot start or see the files), 130 stopped by Ctrl-C or
SIGTERM (files finished so far are kept; run again to continue).
"""


def add_parser(subparsers) -> argparse.ArgumentParser:
    p = subparsers.add_parser(
        "batch", help="run a graph over many files (all cores, or a Dask cluster)",
        description="Run one graph over many recordings and gather one result table.",
        epilog=HELP_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("graph", help="graph file (TOML) with a file-source to bind each input to")
    p.add_argument("--inputs", action="append", required=True, metavar="GLOB|FOLDER|LIST",
                   help="files to run over (repeatable)")
    p.add_argument("--out", type=Path, required=True, metavar="DIR",
                   help="output folder (per-file folders and the summary)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="local worker processes (default: the number of CPUs)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="run on Dask: tcp://HOST:PORT of a scheduler, or local:N")
    p.add_argument("--set", dest="overrides", action="append", default=[],
                   metavar="NODE.FIELD=VALUE", help="override a graph field (repeatable)")
    p.add_argument("--pages", action="store_true",
                   help="also write each file's plots and report.html, as streamq run does "
                        "(off by default: they cost more time than a short file's run)")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no summary lines")
    p.set_defaults(func=run)
    return p


def run(args) -> int:
    """Run the batch described by parsed arguments; returns the exit status."""
    from streamq.batch.driver import run_batch
    return run_batch(args)
