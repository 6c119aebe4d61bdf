"""Graph files: TOML in, validated node configurations and a build order out.

A graph file has a ``[graph]`` table (name, sample_rate, block) and one table
per node under ``nodes``, named by its id. ``use`` names the node kind; each
input is a field naming the upstream node id. Validation collects every
problem it can find and reports them all at once, each naming the file, the
node and the field.
"""

from __future__ import annotations

import re
import tomllib
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal, Union

from pydantic import BaseModel, ConfigDict, Field, TypeAdapter, ValidationError

from streamq.engine.node import Node, NodeConfig
from streamq.engine.registry import registry
from streamq.errors import StreamqError

_ID = re.compile(r"[A-Za-z_][A-Za-z0-9_-]{0,63}\Z")


class GraphError(StreamqError):
    """One or more problems in a graph file; each line names file, node and field."""

    def __init__(self, problems: list[str]):
        self.problems = [" ".join(p.split()) for p in problems]
        Exception.__init__(self, "\n".join(self.problems))

    def __str__(self) -> str:
        return "\n".join(self.problems)


class GraphHeader(BaseModel):
    """The ``[graph]`` table."""

    model_config = ConfigDict(extra="forbid")
    name: str = Field("graph", min_length=1, max_length=200)
    sample_rate: int | None = Field(None, ge=1, le=1_536_000,
                                    description="Hz; taken from the file sources when left out")
    block: int = Field(256, ge=1, le=1 << 20, description="frames per block in live runs")
    host: Literal["portaudio", "jack"] = Field(
        "portaudio", description="what runs a live graph: a PortAudio stream, or a JACK client "
                                 "of its own (also under PipeWire's JACK layer) whose ports are "
                                 "named <node id>_<channel>")
    batch_input: str | None = Field(
        None, description="id of the file-source that `streamq batch` binds to each input file "
                          "(default: the graph's only file-source)")


@dataclass
class Graph:
    """A validated graph: header, node objects in build order, and where it came from."""

    header: GraphHeader
    nodes: dict[str, Node]
    order: list[str]
    source: Path | None = None
    raw: dict[str, Any] = field(default_factory=dict)

    @property
    def name(self) -> str:
        return self.header.name


def _fmt_loc(loc: tuple) -> str:
    return ".".join(str(p) for p in loc)


def _error_text(err: dict[str, Any]) -> str:
    """The message of one pydantic error, without the prefix pydantic puts before
    what a validator raised ("Value error, bad duration ..." -> "bad duration ...")."""
    msg = str(err["msg"])
    for prefix in ("Value error, ", "Assertion failed, "):
        msg = msg.removeprefix(prefix)
    return msg


def _set_override(raw: dict[str, Any], item: str, label: str) -> str | None:
    """Apply one ``node.field=value`` override to the raw TOML dict."""
    if "=" not in item:
        return f"{label}: --set {item!r}: expected NODE.FIELD=VALUE"
    key, value_text = item.split("=", 1)
    path = key.strip().split(".")
    if len(path) != 2 or not all(path):
        return f"{label}: --set {item!r}: expected NODE.FIELD=VALUE (or graph.FIELD=VALUE)"
    try:
        value = tomllib.loads(f"v = {value_text.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        value = value_text.strip()
    node_id, fld = path
    if node_id == "graph":
        header = raw.setdefault("graph", {})
        if not isinstance(header, dict):
            return f"{label}: --set {item!r}: 'graph' is not a table"
        header[fld] = value
        return None
    nodes = raw.get("nodes")
    if not isinstance(nodes, dict) or node_id not in nodes:
        return f"{label}: --set {item!r}: there is no node '{node_id}'"
    if not isinstance(nodes[node_id], dict):
        return f"{label}: --set {item!r}: node '{node_id}' is not a table of fields"
    nodes[node_id][fld] = value
    return None


def _nul_fields(value: Any, loc: str = "") -> list[str]:
    """Locations of strings holding a NUL character (TOML allows "\\u0000"; the
    operating system would cut a path there and use another file)."""
    if isinstance(value, str):
        return [loc] if "\x00" in value else []
    if isinstance(value, dict):
        return [f for k, v in value.items() for f in _nul_fields(v, f"{loc}.{k}" if loc else str(k))]
    if isinstance(value, list):
        return [f for i, v in enumerate(value) for f in _nul_fields(v, f"{loc}[{i}]")]
    return []


_SCALARS = {int: ("an integer", (int,)), float: ("a number", (int, float)),
            bool: ("true or false", (bool,)), str: ("text", (str,))}


def _scalar_types(annotation: Any) -> tuple[list[str], tuple[type, ...]] | None:
    """What a plain scalar field takes, as (descriptions, TOML value types);
    None when the field is not made of plain scalars (durations, lists...)."""
    if annotation is type(None):
        return [], ()
    if typing.get_origin(annotation) is typing.Literal:
        kinds = {type(a) for a in typing.get_args(annotation)}
        return [_SCALARS[k][0] for k in kinds if k in _SCALARS], tuple(kinds)
    if typing.get_origin(annotation) in (Union, types.UnionType):
        names: list[str] = []
        allowed: tuple[type, ...] = ()
        for arg in typing.get_args(annotation):
            sub = _scalar_types(arg)
            if sub is None:
                return None
            names += sub[0]
            allowed += sub[1]
        return names, allowed
    if annotation in _SCALARS:
        return [_SCALARS[annotation][0]], _SCALARS[annotation][1]
    return None


def _wrong_types(config: type[BaseModel], table: dict[str, Any]) -> dict[str, str]:
    """Field -> problem, for values of the wrong TOML type that pydantic would
    quietly convert (``bits = true`` into 1, ``seconds = "5"`` into 5.0)."""
    out = {}
    for name, f in config.model_fields.items():
        if name not in table or name == "use":
            continue
        sub = _scalar_types(f.annotation)
        value = table[name]
        if sub is None or not sub[1]:
            continue
        names, allowed = sub
        if isinstance(value, bool) and bool not in allowed or not isinstance(value, allowed):
            if isinstance(value, bool):
                got = str(value).lower()
            else:
                shown = repr(value)
                shown = shown if len(shown) <= 60 else shown[:57] + "..."
                got = {int: "an integer", float: "a number", str: "text", list: "a list",
                       dict: "a table"}.get(type(value), type(value).__name__) + f" ({shown})"
            out[name] = f"expected {' or '.join(dict.fromkeys(names))}, got {got}"
    return out


def _config_adapter(kinds: dict[str, type[Node]]) -> TypeAdapter:
    models = tuple(cls.Config for cls in kinds.values())
    if len(models) == 1:
        return TypeAdapter(models[0])
    return TypeAdapter(Annotated[Union[models], Field(discriminator="use")])


def infer_rate(graph: Graph) -> int:
    """The rate a graph runs at.

    Parameters
    ----------
    graph : Graph
        A graph (validated or not yet: its nodes need only exist).

    Returns
    -------
    int
        ``graph.sample_rate`` from the header if set, else the rate of the first
        source with a file that can be read (``natural_rate``), else 48,000 Hz.
    """
    if graph.header.sample_rate:
        return graph.header.sample_rate
    for node in graph.nodes.values():
        rate = getattr(node, "natural_rate", None)
        if callable(rate):
            r = rate(graph)
            if r:
                return r
    return 48_000


def parse_graph(text: str, source: Path | None = None, overrides: list[str] = (), *,
                precheck: bool = False) -> Graph:
    """Validate a graph given as TOML text. Raises GraphError listing every problem.

    With ``precheck``, also list what the nodes can see before they are opened
    (missing or unsuitable input files; see :meth:`Node.precheck`).
    """
    label = str(source) if source is not None else "<graph>"
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise GraphError([f"{label}: TOML syntax error: {exc}"]) from None
    except RecursionError:  # tomllib parses nested arrays and inline tables recursively
        raise GraphError([f"{label}: TOML syntax error: arrays or inline tables nested too "
                          f"deeply"]) from None
    return validate_graph(raw, source, overrides, precheck=precheck)


def load_graph(path: str | Path, overrides: list[str] = (), *, precheck: bool = False) -> Graph:
    """Read and validate a graph file (``precheck``: see :func:`parse_graph`)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")  # a byte-order mark from some editors is fine
    except FileNotFoundError:
        raise StreamqError(f"{path}: no such graph file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise StreamqError(f"{path}: cannot read graph file: {exc}") from None
    return parse_graph(text, path, overrides, precheck=precheck)


def validate_graph(raw: dict[str, Any], source: Path | None = None,
                   overrides: list[str] = (), *, precheck: bool = False) -> Graph:
    label = str(source) if source is not None else "<graph>"
    problems: list[str] = []
    for item in overrides:
        msg = _set_override(raw, item, label)
        if msg:
            problems.append(msg)

    unknown_top = sorted(set(raw) - {"graph", "nodes"})
    for key in unknown_top:
        problems.append(f"{label}: unknown top-level table '{key}' (expected [graph] and [nodes.<id>])")

    header_raw = raw.get("graph", {})
    header = GraphHeader()
    if not isinstance(header_raw, dict):
        problems.append(f"{label}: [graph] must be a table")
    elif _nul_fields(header_raw):
        problems.extend(f"{label}: [graph], field '{f}': contains a NUL character (\\u0000)"
                        for f in _nul_fields(header_raw))
    elif _wrong_types(GraphHeader, header_raw):
        problems.extend(f"{label}: [graph], field '{f}': {msg}"
                        for f, msg in _wrong_types(GraphHeader, header_raw).items())
    else:
        try:
            header = GraphHeader.model_validate(header_raw)
        except ValidationError as exc:
            for err in exc.errors():
                problems.append(f"{label}: [graph], field '{_fmt_loc(err['loc'])}': "
                                f"{_error_text(err)}")

    nodes_raw = raw.get("nodes")
    if not isinstance(nodes_raw, dict) or not nodes_raw:
        problems.append(f"{label}: the graph has no nodes (add tables like [nodes.feed])")
        raise GraphError(problems)

    kinds = registry.kinds()
    adapter = _config_adapter(kinds)
    configs: dict[str, NodeConfig] = {}
    unfinished: dict[str, tuple[str, dict]] = {}   # known kind, fields with problems
    for node_id, table in nodes_raw.items():
        where = f"{label}: node '{node_id}'"
        if not _ID.match(node_id):
            problems.append(f"{where}: bad node id (use letters, digits, '_' or '-', "
                            f"start with a letter, at most 64 characters)")
            continue
        if not isinstance(table, dict):
            problems.append(f"{where}: must be a table of fields")
            continue
        nul = _nul_fields(table)
        if nul:
            problems.extend(f"{where}, field '{f}': contains a NUL character (\\u0000)" for f in nul)
            continue
        use = table.get("use")
        if use is None:
            problems.append(f"{where}, field 'use': missing (name the node kind, see `streamq nodes`)")
            continue
        if not isinstance(use, str) or use not in kinds:
            problems.append(f"{where}, field 'use': unknown node kind {use!r}; known kinds: "
                            f"{', '.join(kinds)}")
            continue
        wrong = _wrong_types(kinds[use].Config, table)
        problems.extend(f"{where}, field '{fld}': {msg}" for fld, msg in wrong.items())
        unfinished[node_id] = (use, table)
        try:
            config = adapter.validate_python(table)
            if not wrong:
                configs[node_id] = config
                del unfinished[node_id]
        except ValidationError as exc:
            for err in exc.errors():
                loc = [str(p) for p in err["loc"]]
                if loc and loc[0] == use:  # discriminator tag in the location
                    loc = loc[1:]
                if loc and loc[0] in wrong:  # said above
                    continue
                fld = ".".join(loc)
                msg = _error_text(err)
                if not fld:   # a check across fields: it names its field as "field: ..."
                    head, _, rest = msg.partition(": ")
                    if rest and head in kinds[use].Config.model_fields:
                        fld, msg = head, rest
                    else:
                        problems.append(f"{where}: {msg}")
                        continue
                if err["type"] == "extra_forbidden":
                    msg = f"unknown field for kind '{use}' (see `streamq nodes`)"
                elif err["type"] == "missing":
                    msg = "missing (required)"
                problems.append(f"{where}, field '{fld}': {msg}")

    nodes = {nid: kinds[cfg.use](nid, cfg) for nid, cfg in configs.items()}
    # Wiring: every input names a node that exists and has an output.
    all_ids = set(nodes_raw)
    for nid, node in nodes.items():
        for fld, ref in node.upstream().items():
            if ref not in all_ids:
                problems.append(f"{label}: node '{nid}', field '{fld}': no node named '{ref}'")
            elif ref in nodes and nodes[ref].role in ("sink", "meter"):
                problems.append(f"{label}: node '{nid}', field '{fld}': node '{ref}' "
                                f"({nodes[ref].kind}) has no output to read")
        for fld in node.inputs:
            if fld not in node.optional_inputs and getattr(node.config, fld, None) is None:
                if nid in configs:  # pydantic already reported it when required
                    problems.append(f"{label}: node '{nid}', field '{fld}': missing (required)")
    # a node whose fields have problems still has its wiring checked, so that one
    # `streamq check` lists everything
    for nid, (use, table) in unfinished.items():
        for fld in kinds[use].inputs:
            ref = table.get(fld)
            said = f"{label}: node '{nid}', field '{fld}':"
            if isinstance(ref, str) and ref not in all_ids and \
                    not any(p.startswith(said) for p in problems):
                problems.append(f"{said} no node named '{ref}'")
    if header.batch_input is not None and header.batch_input not in all_ids:
        problems.append(f"{label}: [graph], field 'batch_input': no node named '{header.batch_input}'")
    order, cycle = _topological_order(nodes)
    if cycle:
        first, before = cycle[0], cycle[-1]
        fld = next((f for f, ref in nodes[first].upstream().items() if ref == before), "input")
        problems.append(f"{label}: node '{first}', field '{fld}': cycle through nodes "
                        + " -> ".join(f"'{c}'" for c in cycle + [first]))
    graph = Graph(header=header, nodes=nodes, order=order, source=source, raw=raw)
    if precheck:
        rate = infer_rate(graph)
        for node in nodes.values():
            problems.extend(f"{label}: {msg}" for msg in node.precheck(source, rate))
    if problems:
        raise GraphError(problems)
    return graph


def _topological_order(nodes: dict[str, Node]) -> tuple[list[str], list[str]]:
    """Kahn's algorithm in file order. Returns (order, cycle); cycle is [] when none."""
    deps = {nid: {ref for ref in n.upstream().values() if ref in nodes} for nid, n in nodes.items()}
    order: list[str] = []
    done: set[str] = set()
    pending = list(nodes)
    while pending:
        ready = [nid for nid in pending if deps[nid] <= done]
        if not ready:
            return order, _find_cycle(pending, deps)
        for nid in ready:
            order.append(nid)
            done.add(nid)
        pending = [nid for nid in pending if nid not in done]
    return order, []


def _find_cycle(pending: list[str], deps: dict[str, set[str]]) -> list[str]:
    start = pending[0]
    path: list[str] = []
    seen: dict[str, int] = {}
    node = start
    while node not in seen:
        seen[node] = len(path)
        path.append(node)
        node = sorted(d for d in deps[node] if d in pending)[0]
    cyc = path[seen[node]:]
    return list(reversed(cyc))
