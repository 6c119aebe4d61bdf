"""Imported once by the pool's fork server, so that every worker process starts
with the engine and all node kinds already loaded (forked, not imported again)."""

from streamq.batch import work  # noqa: F401
from streamq.engine.registry import registry

try:
    registry.kinds()
except Exception:  # a broken plugin: let the worker report it for each file
    pass
