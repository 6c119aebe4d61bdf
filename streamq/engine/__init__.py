"""The streaming engine: wire types, node base class, registry, graphs, runners."""

from streamq.engine.blocks import (CodebookUpdate, IndexBlock, Packet, PdfSnapshot, SignalBlock,
                                   StreamSpec, index_dtype)
from streamq.engine.graph import Graph, GraphError, load_graph, parse_graph
from streamq.engine.node import Duration, Node, NodeConfig, RunContext, SourceNode
from streamq.engine.registry import register, registry

__all__ = [
    "CodebookUpdate", "IndexBlock", "Packet", "PdfSnapshot", "SignalBlock", "StreamSpec",
    "index_dtype", "Graph", "GraphError", "load_graph", "parse_graph", "Duration", "Node",
    "NodeConfig", "RunContext", "SourceNode", "register", "registry",
]
