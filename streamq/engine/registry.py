"""Where node kinds are found: built-in modules and the ``streamq.nodes``
entry-point group (for node kinds shipped by other packages).

An entry point's value is a :class:`~streamq.engine.node.Node` subclass, e.g.
in a plugin's pyproject.toml::

    [project.entry-points."streamq.nodes"]
    my-kind = "my_package.nodes:MyNode"
"""

from __future__ import annotations

import importlib
import threading
from importlib.metadata import entry_points

from streamq.engine.node import Node, SourceNode
from streamq.errors import StreamqError

ENTRY_POINT_GROUP = "streamq.nodes"
_BUILTIN_MODULES = (
    "streamq.nodes.sources",
    "streamq.nodes.sinks",
    "streamq.nodes.estimator",
    "streamq.nodes.encoder",
    "streamq.nodes.decoder",
    "streamq.nodes.meter",
    "streamq.nodes.indexfile",
    "streamq.nodes.live",
)


class Registry:
    """Maps node-kind names to Node classes."""

    def __init__(self) -> None:
        self._kinds: dict[str, type[Node]] = {}
        self._loaded = False
        self._loading = False
        # Several threads may validate graphs at once (e.g. a Dask worker with
        # several threads): the others wait until the first has loaded every kind.
        self._lock = threading.RLock()

    def add(self, cls: type[Node]) -> type[Node]:
        if not cls.kind:
            raise TypeError(f"{cls.__name__} has no kind name")
        other = self._kinds.get(cls.kind)
        if other is not None and other is not cls:
            raise StreamqError(
                f"node kind '{cls.kind}' is defined twice ({other.__module__}.{other.__name__} "
                f"and {cls.__module__}.{cls.__name__})")
        self._kinds[cls.kind] = cls
        return cls

    def _load(self) -> None:
        if self._loaded:
            return
        with self._lock:
            if self._loaded or self._loading:  # done meanwhile, or called again while importing
                return
            self._loading = True
            try:
                self._load_all()
            finally:
                self._loading = False
                self._loaded = True

    def _load_all(self) -> None:
        for mod in _BUILTIN_MODULES:
            try:
                importlib.import_module(mod)
            except ModuleNotFoundError as exc:  # a family not written yet
                if exc.name != mod:
                    raise
        for ep in entry_points(group=ENTRY_POINT_GROUP):
            try:
                cls = ep.load()
            except Exception as exc:  # a broken plugin must not take the tool down
                raise StreamqError(
                    f"node plugin '{ep.name}' ({ep.value}) failed to load: {exc}") from None
            if not (isinstance(cls, type) and issubclass(cls, Node)) or cls in (Node, SourceNode):
                raise StreamqError(
                    f"node plugin '{ep.name}' ({ep.value}) is not a streamq Node class")
            if not cls.kind:
                cls.kind = ep.name
            self.add(cls)

    def get(self, kind: str) -> type[Node] | None:
        self._load()
        return self._kinds.get(kind)

    def kinds(self) -> dict[str, type[Node]]:
        self._load()
        return dict(sorted(self._kinds.items()))


registry = Registry()


def register(cls: type[Node]) -> type[Node]:
    """Class decorator for built-in node kinds."""
    return registry.add(cls)
