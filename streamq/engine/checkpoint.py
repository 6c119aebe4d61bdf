"""Checkpoints of offline runs, and resuming from one (``streamq run --resume``).

Every few seconds of wall time, at a step boundary, an offline run writes
``.streamq-checkpoint`` into its output folder (under a temporary name,
renamed when whole): the sample reached, every node's state
(:meth:`Node.checkpoint`; sinks first make what they wrote durable), and
fingerprints of what the run depends on: the streamq version, the graph file's
text with the ``--set`` values, and each input file's size and modification
time. A run that finishes removes it.

``--resume`` reads it back, refuses it when any fingerprint differs, sets the
interrupted run's output files aside, builds the graph, hands each node its
state (sinks continue the files set aside) and runs on from that sample: the
outputs and the report equal those of an uninterrupted run.
"""

from __future__ import annotations

import hashlib
import io
import os
import pickle
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from streamq.errors import StreamqError

NAME = ".streamq-checkpoint"
#: seconds of wall time between checkpoints (STREAMQ_CHECKPOINT_SECONDS overrides)
EVERY = 5.0
#: input fields of node configurations that name files a run reads
_INPUT_FIELDS = ("path", "train", "codebooks_from")


class _StateUnpickler(pickle.Unpickler):
    """Reads a checkpoint, refusing every class but the state types of streamq's
    own nodes, numpy arrays and a few plain containers: a checkpoint file cannot
    run code it brings along (a plain ``pickle.load`` would)."""

    _ALLOWED_MODULES = ("streamq.",)
    _ALLOWED = {("collections", "deque"), ("collections", "OrderedDict"),
                ("builtins", "set"), ("builtins", "frozenset"), ("builtins", "slice"),
                ("builtins", "complex"), ("builtins", "bytearray"), ("builtins", "range"),
                ("numpy", "dtype"), ("numpy", "ndarray"),
                ("numpy.core.multiarray", "_reconstruct"), ("numpy._core.multiarray", "_reconstruct"),
                ("numpy.core.multiarray", "scalar"), ("numpy._core.multiarray", "scalar"),
                ("numpy.core.numeric", "_frombuffer"), ("numpy._core.numeric", "_frombuffer"),
                ("array", "array"), ("array", "_array_reconstructor"),
                ("copyreg", "_reconstructor"), ("builtins", "object")}

    def find_class(self, module: str, name: str):
        if (module, name) in self._ALLOWED or (module.startswith(self._ALLOWED_MODULES)
                                               and not name.startswith("_")):
            return super().find_class(module, name)
        raise pickle.UnpicklingError(f"{module}.{name} is not a streamq state type")


def every() -> float:
    try:
        return float(os.environ.get("STREAMQ_CHECKPOINT_SECONDS", EVERY))
    except ValueError:
        return EVERY


@dataclass
class Checkpoint:
    """What a checkpoint file holds."""

    fingerprint: dict[str, Any]
    position: int
    states: dict[str, Any]
    outputs: dict[str, list[str]]     # sink id -> [final path, temporary path]


def fingerprint(graph, overrides) -> dict[str, Any]:
    """What a run depends on: streamq's version, the graph file's text and the
    ``--set`` values, and every input file's size and modification time."""
    from streamq import __version__
    from streamq.engine.node import input_path
    text = Path(graph.source).read_bytes() if graph.source else b""
    h = hashlib.sha256(text)
    for item in overrides:
        h.update(b"\0" + str(item).encode("utf-8"))
    inputs = {}
    for nid in graph.order:
        node = graph.nodes[nid]
        if node.role == "sink":
            continue
        for fld in _INPUT_FIELDS:
            value = getattr(node.config, fld, None)
            if isinstance(value, str):
                p = input_path(value, graph.source)
                try:
                    st = p.stat()
                    inputs[f"{nid}.{fld}"] = [str(p), st.st_size, st.st_mtime_ns]
                except OSError:
                    inputs[f"{nid}.{fld}"] = [str(p), None, None]
    return {"streamq": __version__, "graph": h.hexdigest(), "inputs": inputs}


def save(out_dir: Path, fp: dict, position: int, built) -> None:
    """Write the checkpoint of ``built`` at ``position`` atomically."""
    nodes = built.graph.nodes
    states = {nid: nodes[nid].checkpoint() for nid in built.graph.order}
    outputs = {nid: [str(p) for p in nodes[nid].output_files()] for nid in built.graph.order
               if nodes[nid].output_files()}
    data = pickle.dumps(Checkpoint(fp, position, states, outputs), protocol=pickle.HIGHEST_PROTOCOL)
    path = Path(out_dir) / NAME
    tmp = path.with_name(NAME + ".part")
    try:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        raise StreamqError(f"{path}: cannot write the checkpoint ({exc.strerror or exc})") from None


def clear(out_dir: Path) -> None:
    for name in (NAME, NAME + ".part"):
        try:
            (Path(out_dir) / name).unlink()
        except OSError:
            pass


def load(out_dir: Path, fp: dict) -> Checkpoint:
    """The checkpoint in ``out_dir``, checked against this run's fingerprint."""
    path = Path(out_dir) / NAME
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise StreamqError(f"--resume: {out_dir} holds no checkpoint (the run there finished, "
                           f"or never got to its first checkpoint); run without --resume") \
            from None
    except OSError as exc:
        raise StreamqError(f"--resume: {path}: cannot read it ({exc.strerror or exc})") from None
    try:
        ck = _StateUnpickler(io.BytesIO(data)).load()
        if not isinstance(ck, Checkpoint):
            raise TypeError(type(ck).__name__)
    except Exception as exc:
        raise StreamqError(f"--resume: {path} is not a streamq checkpoint, or is damaged "
                           f"({type(exc).__name__}); run without --resume") from None
    old = ck.fingerprint
    if old.get("streamq") != fp["streamq"]:
        raise StreamqError(f"--resume: the checkpoint in {out_dir} was written by streamq "
                           f"{old.get('streamq')}, this is {fp['streamq']}; run without --resume")
    if old.get("graph") != fp["graph"]:
        raise StreamqError(f"--resume: the checkpoint in {out_dir} is of another graph (the "
                           f"graph file or the --set values differ); run without --resume")
    for key in sorted(set(old.get("inputs", {})) | set(fp["inputs"])):
        a, b = old.get("inputs", {}).get(key), fp["inputs"].get(key)
        if a != b:
            node, fld = key.split(".", 1)
            raise StreamqError(f"--resume: node '{node}', field '{fld}': the input file "
                               f"{(b or a)[0]} changed since the checkpoint (size or "
                               f"modification time); run without --resume")
    return ck


def set_aside(ck: Checkpoint) -> dict[str, Path | None]:
    """Move each sink's earlier file (the temporary one a killed run left, or
    the finished one an interrupted run renamed into place) out of the way of
    the new run; sink id -> where it went (None when there is none)."""
    moved: dict[str, Path | None] = {}
    for nid, (final, tmp) in ck.outputs.items():
        final, tmp = Path(final), Path(tmp)
        aside = tmp.with_name(tmp.name + ".resume")
        src = tmp if tmp.exists() else final if final.exists() else None
        if src is None:
            moved[nid] = None
            continue
        try:
            os.replace(src, aside)
        except OSError as exc:
            raise StreamqError(f"--resume: node '{nid}': cannot set {src} aside "
                               f"({exc.strerror or exc})") from None
        moved[nid] = aside
    return moved


def restore(built, ck: Checkpoint, moved: dict[str, Path | None]) -> None:
    """Hand every node its state (sinks continue the files set aside)."""
    nodes = built.graph.nodes
    if sorted(ck.states) != sorted(built.graph.order):
        raise StreamqError("--resume: the checkpoint's nodes are not this graph's; run "
                           "without --resume")
    for nid in built.graph.order:
        if nid in ck.outputs:
            nodes[nid].resume(ck.states[nid], moved.get(nid))
        else:
            nodes[nid].resume(ck.states[nid])
