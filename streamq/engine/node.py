"""The node base class and the configuration base every node kind extends."""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, ClassVar

from pydantic import BaseModel, ConfigDict, GetCoreSchemaHandler
from pydantic_core import core_schema

from streamq.engine.blocks import Packet, StreamSpec
from streamq.errors import StreamqError

_DURATION = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*(ms|s|samples?)?\s*$")


class Duration:
    """A length of time given as samples (``4800``, ``"4800 samples"``) or as
    milliseconds/seconds (``"100 ms"``, ``"0.5 s"``).

    It is turned into a whole number of samples once the sample rate is known
    (:meth:`samples`); every schedule in streamq is defined in samples.
    """

    __slots__ = ("value", "unit")

    def __init__(self, value: float, unit: str = "samples"):
        self.value = float(value)
        self.unit = unit

    @classmethod
    def parse(cls, raw: Any) -> "Duration":
        if isinstance(raw, Duration):
            return raw
        if isinstance(raw, bool):
            raise ValueError("a duration is a number of samples or a string like '100 ms' or '2 s'")
        if isinstance(raw, int):
            if raw < 0:
                raise ValueError(f"duration must not be negative, got {raw}")
            return cls(raw, "samples")
        if isinstance(raw, str):
            m = _DURATION.match(raw)
            if m:
                value, unit = float(m.group(1)), (m.group(2) or "samples")
                if unit.startswith("sample"):
                    if value != int(value):
                        raise ValueError(f"'{raw}' is not a whole number of samples")
                    unit = "samples"
                return cls(value, unit)
        raise ValueError(
            f"bad duration {raw!r}: give samples (4800) or a string like '100 ms' or '0.5 s'")

    def samples(self, rate: int) -> int:
        """This duration in whole samples at ``rate`` Hz (rounded to nearest)."""
        if self.unit == "samples":
            return int(self.value)
        seconds = self.value / 1000.0 if self.unit == "ms" else self.value
        return int(round(seconds * rate))

    def __repr__(self) -> str:
        if self.unit == "samples":
            return f"{int(self.value)}"
        v = int(self.value) if self.value == int(self.value) else self.value
        return f"{v} {self.unit}"

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Duration) and (self.value, self.unit) == (other.value, other.unit)

    @classmethod
    def __get_pydantic_core_schema__(cls, source: Any, handler: GetCoreSchemaHandler):
        return core_schema.no_info_plain_validator_function(
            cls.parse, serialization=core_schema.plain_serializer_function_ser_schema(repr),
            json_schema_input_schema=core_schema.union_schema(
                [core_schema.int_schema(ge=0), core_schema.str_schema()]),
        )


class NodeConfig(BaseModel):
    """Base of every node kind's configuration model (one TOML table under ``nodes``)."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    use: str


@dataclass
class RunContext:
    """What a node may need from the run it is part of."""

    graph_file: Path | None
    out_dir: Path | None      # None: nothing is written (an in-process chain without a folder)
    sample_rate: int
    live: bool = False
    # Live runs only (None offline, where nodes just call the function):
    # ``offload(fn, *args) -> Future`` runs heavy work (PDF snapshots, codebook
    # designs) in a worker *process*, so it never holds the interpreter lock
    # the audio callback needs; fn must be a module-level function of
    # picklable arguments. ``background(fn, *args) -> Future`` runs short
    # work that touches node state (e.g. a meter summing finished frames) on
    # one worker thread, in submission order.
    offload: Callable[..., Any] | None = None
    background: Callable[..., Any] | None = None
    options: dict[str, Any] = field(default_factory=dict)

    def resolve_path(self, path: str | Path) -> Path:
        """Relative output paths land in the run's output folder (a run with
        none refuses them)."""
        p = Path(path)
        if p.is_absolute():
            return p
        if self.out_dir is None:
            raise StreamqError(f"the relative path '{path}' needs an output folder, and this "
                               f"chain has none (give Chain an out_dir, or an absolute path)")
        return self.out_dir / p

    def resolve_input(self, path: str | Path) -> Path:
        """Relative input paths are taken relative to the graph file's folder."""
        return input_path(path, self.graph_file)


def input_path(path: str | Path, graph_file: Path | None) -> Path:
    """An input path as given, with ``~`` expanded, relative to the graph file's folder."""
    p = Path(path)
    try:
        p = p.expanduser()
    except RuntimeError:  # "~name" of no known user: keep the name as it is
        pass
    if p.is_absolute() or graph_file is None:
        return p
    return graph_file.parent / p


class Node:
    """Base class of every node kind.

    A subclass sets ``kind`` (the name used in graph files), ``Config`` (a
    :class:`NodeConfig` subclass with ``use: Literal[kind]``) and ``inputs``
    (the names of the config fields that name upstream nodes; optional ones
    also appear in ``optional_inputs``). It then implements:

    ``open(specs, ctx)``
        Check the upstream streams (``specs`` maps input field -> StreamSpec),
        prepare state and return the output :class:`StreamSpec`, or None for
        a node without output (sinks). Raise StreamqError for bad setups.
    ``step(frames, inputs)``
        Process one step. ``inputs`` maps input field -> :class:`Packet`, all
        covering the same frame range. Return the output Packet (exactly
        ``frames`` frames: sample conservation) or None.
    ``finish()``
        The input ended normally; flush.
    ``close(complete)``
        Always called last, also after errors or interruption: release
        resources, leave files valid.
    ``report()``
        A JSON-able dict for report.json, or None.
    ``get_state()/set_state()``
        Everything the node needs to continue a stream (rule 3: explicit state).
    ``precheck(graph_file, sample_rate)``
        Optional: problems visible before anything is opened (a missing input
        file, a setting that does not fit the sample rate), so that
        ``streamq check`` and ``run`` list them with the validation problems.
        ``open`` must still check the same things.
    """

    kind: ClassVar[str] = ""
    Config: ClassVar[type[NodeConfig]] = NodeConfig
    inputs: ClassVar[tuple[str, ...]] = ()
    optional_inputs: ClassVar[tuple[str, ...]] = ()
    #: "meter" nodes go under report.json's "meters", "sink" nodes under "outputs".
    role: ClassVar[str] = "node"
    #: live-only kinds (device I/O) set this; offline runs refuse them.
    live_only: ClassVar[bool] = False
    #: an offline run may step this node on a thread of its own, blocks in order,
    #: while the rest of the graph computes the next block. For nodes with no
    #: output that nothing reads until the run ends (meters): ``step`` must keep
    #: to the node's own state, and ``finish``, ``close`` and ``report`` come after
    #: the thread has stepped every block. Blocks are never changed once emitted,
    #: so reading them later is safe.
    runs_behind: ClassVar[bool] = False

    def __init__(self, node_id: str, config: NodeConfig):
        self.id = node_id
        self.config = config
        self.spec: StreamSpec | None = None
        self.ctx: RunContext | None = None

    # -- wiring ---------------------------------------------------------------
    def upstream(self) -> dict[str, str]:
        """Input field -> upstream node id, for the inputs that are set."""
        out = {}
        for name in self.inputs:
            ref = getattr(self.config, name, None)
            if ref is not None:
                out[name] = ref
        return out

    def live_upstream(self) -> dict[str, str]:
        """The inputs this node reads when it steps in a live audio callback
        (default: all). A node that gets an input's data another way in live
        runs (the encoder subscribes to its estimator) leaves it out, so the
        callback need not run that upstream node."""
        return self.upstream()

    def fail(self, field_name: str | None, message: str) -> StreamqError:
        """A StreamqError naming this node (and field)."""
        where = f"node '{self.id}'" + (f", field '{field_name}'" if field_name else "")
        return StreamqError(f"{where}: {message}")

    @staticmethod
    def problems_of(check: Callable[..., Any], *args) -> list[str]:
        """Run a check that raises a one-line StreamqError (as :meth:`fail` makes)
        and give its message as a list, empty when it passes: a
        :meth:`precheck` made of the same checks ``open`` runs."""
        try:
            check(*args)
        except StreamqError as exc:
            return [str(exc)]
        return []

    # -- life cycle (override) ------------------------------------------------
    def open(self, specs: dict[str, StreamSpec], ctx: RunContext) -> StreamSpec | None:
        raise NotImplementedError

    def step(self, frames: int, inputs: dict[str, Packet]) -> Packet | None:
        raise NotImplementedError

    def finish(self) -> None:
        pass

    def close(self, complete: bool) -> None:
        pass

    def report(self) -> dict[str, Any] | None:
        return None

    def checkpoint(self) -> Any:
        """The node's state at a checkpoint of an offline run (default:
        :meth:`get_state`). Sinks also make what they have written durable."""
        return self.get_state()

    def resume(self, state: Any, earlier: Path | None = None) -> None:
        """Continue from a checkpoint (default: :meth:`set_state`). Sinks get the
        file the interrupted run wrote (``earlier``), set aside, to continue."""
        self.set_state(state)

    def output_files(self) -> list[Path]:
        """Sinks: the files they write, as (final path, temporary path) pairs
        flattened (a checkpoint sets the earlier run's aside before resuming)."""
        return []

    def get_state(self) -> dict[str, Any]:
        return {}

    def precheck(self, graph_file: Path | None, sample_rate: int) -> list[str]:
        """Problems this node can see before the graph is built.

        Parameters
        ----------
        graph_file : Path or None
            The graph file (relative input paths are taken from its folder).
        sample_rate : int
            The rate the graph will run at (see :func:`streamq.engine.graph.infer_rate`).

        Returns
        -------
        list of str
            One-line messages naming this node and the field, as made by
            :meth:`fail`; empty when nothing is wrong (the default).
        """
        return []

    def set_state(self, state: dict[str, Any]) -> None:
        pass

    @classmethod
    def help(cls) -> str:
        """One-line help: the first line of the class docstring."""
        doc = (cls.__doc__ or "").strip()
        return doc.splitlines()[0] if doc else ""


class SourceNode(Node):
    """A node with no inputs that produces frames: ``length`` is its total
    frame count (None when endless, e.g. a live device)."""

    length: int | None = None
