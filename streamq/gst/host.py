"""The streamq side of the ``streamq-chain`` GStreamer element.

Everything here is plain Python and numpy (no GStreamer import), so it runs
and is tested in the project's own interpreter; the element in
``python/streamq_chain.py`` only moves buffers, caps, queries and messages
between GStreamer and a :class:`PipelineChain`.
"""

from __future__ import annotations

import re
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from streamq.errors import StreamqError

#: between two overrides in the ``set`` property: ``;``, a new line, or a comma
#: followed by the next ``NODE.FIELD=`` (so a list value like ``[1, 2]`` keeps its commas)
_OVERRIDE_SPLIT = re.compile(r"\s*[;\n]\s*|\s*,\s*(?=[A-Za-z0-9_-]+\.[A-Za-z0-9_-]+\s*=)")


def split_overrides(text: str | None) -> list[str]:
    """The ``set`` property's overrides as ``--set`` takes them, one by one.

    Parameters
    ----------
    text : str or None
        ``"enc.bits=6, mon.gain_db=0"`` or ``"enc.bits=6; mon.gain_db=0"``.

    Returns
    -------
    list of str
        ``["enc.bits=6", "mon.gain_db=0"]``; empty pieces are dropped.
    """
    if not text:
        return []
    return [p.strip() for p in _OVERRIDE_SPLIT.split(text) if p and p.strip()]


def one_line(exc: BaseException) -> str:
    """A streamq error as one line (a graph's several problems joined by ``; ``)."""
    lines = [ln.strip() for ln in str(exc).splitlines() if ln.strip()]
    return "; ".join(lines) or type(exc).__name__


class PipelineChain:
    """A graph with one ``live-input`` and one ``live-output``, run for a media pipeline.

    Loading checks everything that can be checked before any audio: the graph
    file and its fields (with the overrides), and whether every node opens
    (the check of ``streamq check``, in a temporary folder: nothing is
    written). The chain itself opens in :meth:`start`, once the stream's
    format is agreed; until then nothing is written anywhere.

    Parameters
    ----------
    graph : str or Path
        The graph file.
    overrides : str, optional
        The ``set`` property (see :func:`split_overrides`).
    out_dir : str or Path, optional
        The run's output folder: sinks with relative paths, the meters' files
        and ``report.json``. None: the chain writes no folder (a sink with a
        relative path is then refused).
    report : str or Path, optional
        A file to write the report to at the end of the stream (JSON, the
        content of ``report.json``), in addition to the one in ``out_dir``.

    Attributes
    ----------
    source : str
        The graph file as messages name it.
    input_id, output_id : str
        The live-input and live-output node ids.
    sample_rate, in_channels, out_channels, latency : int
        The stream the graph takes and gives; ``latency`` in frames (the
        lookahead the graph declares up to its live-output).

    Raises
    ------
    StreamqError
        One line (or several, one per problem, for a graph with several)
        naming file, node and field.
    """

    def __init__(self, graph: str | Path | None, overrides: str | None = None,
                 out_dir: str | Path | None = None, report: str | Path | None = None):
        from streamq.chain import Chain
        from streamq.engine.graph import load_graph
        if not graph:
            raise StreamqError("streamq-chain: property 'graph' is not set; give graph=FILE "
                               "(a graph file with one live-input and one live-output)")
        self.path = Path(graph)
        self.source = str(self.path)
        self.overrides = split_overrides(overrides)
        self.out_dir = Path(out_dir) if out_dir else None
        self.report_path = Path(report) if report else None
        if self.report_path is not None and self.report_path.is_dir():
            raise StreamqError(f"{self.report_path}: property 'report' names a folder; give a "
                               f"file name (e.g. {self.report_path / 'report.json'})")
        self.chain = Chain.load(self.path, self.out_dir, self.overrides, realtime=False)
        if len(self.chain.inputs) != 1 or len(self.chain.outputs) != 1:
            raise StreamqError(
                f"{self.source}: streamq-chain runs a graph with exactly one live-input and one "
                f"live-output; this one has {len(self.chain.inputs)} live-input(s) "
                f"({', '.join(self.chain.inputs) or 'none'}) and {len(self.chain.outputs)} "
                f"live-output(s) ({', '.join(self.chain.outputs) or 'none'})")
        self.input_id = self.chain.inputs[0]
        self.output_id = self.chain.outputs[0]
        self.in_channels = self.chain.channels()
        # the probe: a second copy of the graph opened and closed as `streamq check`
        # does, to learn the output's channels and latency before anything runs
        probe = load_graph(self.path, self.overrides)
        self.sample_rate, self.out_channels, self.latency = _probe(probe, self.output_id)
        self.report: dict[str, Any] | None = None

    # -- the stream's format ----------------------------------------------------------
    def check_format(self, rate: int, channels: int) -> None:
        """Refuse a stream the graph cannot take, naming file, node and field.

        Raises
        ------
        StreamqError
            The rate is not the graph's, or the channel count not the live-input's.
        """
        if rate != self.sample_rate:
            raise StreamqError(
                f"{self.source}: [graph], field 'sample_rate': the graph runs at "
                f"{self.sample_rate} Hz, the stream comes at {rate} Hz (resample before "
                f"streamq-chain: audioresample ! audio/x-raw,rate={self.sample_rate})")
        if channels != self.in_channels:
            raise StreamqError(
                f"{self.source}: node '{self.input_id}', field 'channels': the live-input takes "
                f"{self.in_channels} channel(s), the stream has {channels} (convert before "
                f"streamq-chain: audioconvert ! audio/x-raw,channels={self.in_channels})")

    @property
    def latency_seconds(self) -> float:
        """The declared latency in seconds."""
        return self.latency / self.sample_rate

    # -- life cycle -------------------------------------------------------------------
    @property
    def is_open(self) -> bool:
        return self.chain.state == "open"

    def start(self) -> None:
        """Open the chain (and its output folder) once the format is agreed."""
        if self.chain.state != "new":
            return
        if self.out_dir is not None:
            from streamq.runner import prepare_out_dir
            prepare_out_dir(self.out_dir)
        self.chain.open()

    def process(self, data: np.ndarray) -> np.ndarray:
        """Interleaved float32 samples in, the live-output's samples out.

        Parameters
        ----------
        data : numpy.ndarray
            float32, shaped (frames, in_channels) or flat (frames * in_channels).

        Returns
        -------
        numpy.ndarray
            float32 (frames, out_channels); buffers longer than the chain's
            largest step are cut into pieces (the result does not depend on it).
        """
        from streamq.chain import MAX_FRAMES
        x = np.asarray(data, dtype=np.float32).reshape(-1, self.in_channels)
        n = x.shape[0]
        if n == 0:
            return np.zeros((0, self.out_channels), dtype=np.float32)
        try:
            if n <= MAX_FRAMES:
                return self.chain.process(x)
            return np.concatenate([self.chain.process(x[i:i + MAX_FRAMES])
                                   for i in range(0, n, MAX_FRAMES)])
        except StreamqError as exc:
            # name the graph file where Chain names its own method
            text = str(exc)
            if text.startswith("Chain.process: "):
                raise StreamqError(f"{self.source}: {text[len('Chain.process: '):]}") from None
            raise

    def finish(self) -> dict[str, Any]:
        """End of stream: close the chain, write the report(s); returns the report."""
        if self.chain.state == "new":
            self.chain.close()
            self.report = {}
            return self.report
        if self.chain.state == "closed":
            return self.report or self.chain.report or {}
        self.report = self.chain.close()
        if self.report_path is not None:
            write_report_file(self.report_path, self.report)
        return self.report

    def abort(self) -> None:
        """The pipeline stopped before the end of the stream (an error, a stop
        without end of stream): the nodes finish what they hold, so the sinks'
        files are whole up to the last sample processed; the report (in
        ``out_dir`` only, not the ``report`` file) says ``"complete": false``."""
        if self.chain.state != "closed":
            self.chain.close(early=True)


def _probe(graph, output_id: str) -> tuple[int, int, int]:
    """(rate, output channels, latency in frames) of a graph, opened as
    ``streamq check`` opens it (no worker, a temporary folder) and closed."""
    from streamq.engine.scheduler import build
    with tempfile.TemporaryDirectory(prefix="streamq-gst-") as tmp:
        built = build(graph, Path(tmp), live=True, options={"check_only": True})
        try:
            spec = built.specs[graph.nodes[output_id].config.input]
            return built.ctx.sample_rate, int(spec.channels), int(spec.latency)
        finally:
            for node in built.graph.nodes.values():
                try:
                    node.close(complete=False)
                except Exception:
                    pass


def write_report_file(path: Path, report: dict[str, Any]) -> Path:
    """Write a report as ``report.json`` is written, under any file name
    (temporary name, renamed once whole)."""
    from streamq.engine.audiofile import replacing
    from streamq.engine.scheduler import report_text
    path = Path(path)
    text = report_text(report)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with replacing(path) as f:
            f.write(text + "\n")
    except OSError as exc:
        raise StreamqError(f"{path}: property 'report': cannot write the report: "
                           f"{exc.strerror or exc}") from None
    return path
