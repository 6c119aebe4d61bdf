"""streamq: design, run and measure audio quantizers on live feeds and recordings.

The pure design math lives in :mod:`streamq.design` and can be used on its own;
the streaming engine lives in :mod:`streamq.engine` and the node kinds in
:mod:`streamq.nodes`; :class:`streamq.Chain` runs a graph in-process, block by
block, inside any host.
"""

__version__ = "0.1.0"

__all__ = ["Chain", "StreamqError", "__version__"]


def __getattr__(name):
    # loaded on first use: `import streamq` stays cheap for the command line
    if name == "Chain":
        from streamq.chain import Chain
        return Chain
    if name == "StreamqError":
        from streamq.errors import StreamqError
        return StreamqError
    raise AttributeError(f"module 'streamq' has no attribute {name!r}")
