"""The ``streamq`` command."""

from __future__ import annotations

import argparse
import sys
import typing
from pathlib import Path

from streamq import __version__
from streamq.errors import StreamqError

EXIT_OK, EXIT_BAD_INPUT, EXIT_INTERRUPTED = 0, 2, 130


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error like every other streamq error (argparse
    prints the whole usage block first); still exit status 2."""

    def error(self, message: str):
        message = " ".join(message.split())
        self.exit(EXIT_BAD_INPUT, f"streamq: {message} (see '{self.prog} --help')\n")


def _seconds(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number of seconds: {text!r}") from None
    if not (value > 0 and value != float("inf")):
        raise argparse.ArgumentTypeError(f"give a positive, finite number of seconds, not {text!r}")
    return value


def _frames(text: str) -> int:
    """argparse type of ``--block``: a whole number of frames, at least 1."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number of frames: {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"block size must be at least 1 frame, got {text!r}")
    return value


def _add_graph_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("graph", help="graph file (TOML)")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="NODE.FIELD=VALUE",
                   help="override a field, e.g. --set enc.bits=6 (repeatable)")


def cmd_check(args) -> int:
    from streamq.engine.graph import load_graph
    from streamq.engine.scheduler import build
    import tempfile
    graph = load_graph(args.graph, args.overrides, precheck=True)
    live = any(n.live_only for n in graph.nodes.values())
    with tempfile.TemporaryDirectory() as tmp:
        built = build(graph, Path(tmp), live=live, options={"check_only": True})
        for node in built.nodes.values():
            node.close(complete=False)
    print(f"{args.graph}: ok: graph '{graph.name}', {len(graph.nodes)} nodes, "
          f"{built.ctx.sample_rate} Hz")
    return EXIT_OK


def cmd_run(args) -> int:
    from streamq.runner import run_graph_file
    return run_graph_file(args)


def _type_name(ann) -> str:
    origin = typing.get_origin(ann)
    if origin is typing.Literal:
        return " | ".join(repr(a) if not isinstance(a, str) else f'"{a}"' for a in typing.get_args(ann))
    if origin in (typing.Union, getattr(__import__("types"), "UnionType", None)):
        parts = [_type_name(a) for a in typing.get_args(ann) if a is not type(None)]
        return " | ".join(parts) + (" (optional)" if type(None) in typing.get_args(ann) else "")
    if origin is list:
        return f"list of {_type_name(typing.get_args(ann)[0])}"
    name = getattr(ann, "__name__", str(ann))
    return {"str": "text", "int": "integer", "float": "number", "bool": "true/false",
            "Duration": "duration (samples, 'N ms' or 'N s')"}.get(name, name)


def cmd_nodes(args) -> int:
    from pydantic_core import PydanticUndefined
    from streamq.engine.registry import registry
    kinds = registry.kinds()
    unknown = [k for k in args.kind if k not in kinds]
    if unknown:
        raise StreamqError(f"unknown node kind {', '.join(map(repr, unknown))}; known kinds: "
                           f"{', '.join(kinds)}")
    for kind, cls in kinds.items():
        if args.kind and kind not in args.kind:
            continue
        print(f"{kind}: {cls.help()}")
        for name, f in cls.Config.model_fields.items():
            if name == "use":
                continue
            tag = " [input]" if name in cls.inputs else ""
            if f.is_required():
                default = "required"
            else:
                d = f.default
                default = "default " + ("none" if d is None else f'"{d}"' if isinstance(d, str) else
                                         "true" if d is True else "false" if d is False else
                                         repr(d) if d is not PydanticUndefined else "?")
            desc = f" - {f.description}" if f.description else ""
            print(f"    {name}{tag}: {_type_name(f.annotation)}; {default}{desc}")
        print()
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="streamq", description="Design, run and measure audio quantizers on live feeds and recordings.")
    parser.add_argument("--version", action="version", version=f"streamq {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("run", help="run a graph (offline from files, or live)")
    _add_graph_args(p)
    p.add_argument("--out", type=Path, help="output folder (default streamq-out/<graph name>/)")
    p.add_argument("--block", type=_frames, help="frames per step (offline default 65536; "
                                            "live default: the graph's block)")
    p.add_argument("--seconds", type=_seconds, help="live runs only: stop after this many seconds "
                                                    "(offline runs go to the end of their sources)")
    p.add_argument("--quiet", action="store_true", help="no progress bar or live meter")
    p.add_argument("--resume", action="store_true",
                   help="offline runs: continue an interrupted run from its last checkpoint in "
                        "the output folder (same graph, --set values and inputs)")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("check", help="validate a graph file without running it")
    _add_graph_args(p)
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("nodes", help="list node kinds with their fields")
    p.add_argument("kind", nargs="*", help="only these kinds")
    p.set_defaults(func=cmd_nodes)

    for modname in ("streamq.design.command", "streamq.report.compare", "streamq.report.sweep",
                    "streamq.live.devices", "streamq.batch", "streamq.gst.command"):
        try:
            mod = __import__(modname, fromlist=["add_parser"])
        except ModuleNotFoundError as exc:
            if exc.name and modname.startswith(exc.name):
                continue
            raise
        mod.add_parser(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_BAD_INPUT
    try:
        return int(args.func(args) or 0)
    except StreamqError as exc:
        for line in str(exc).splitlines() or [type(exc).__name__]:
            print(f"streamq: {line}", file=sys.stderr)
        return getattr(exc, "exit_code", EXIT_BAD_INPUT)
    except KeyboardInterrupt:
        print("streamq: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
