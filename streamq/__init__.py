"""streamq: design, run and measure audio quantizers on live feeds and recordings.

The pure design math lives in :mod:`streamq.design` and can be used on its own;
the streaming engine lives in :mod:`streamq.engine` and the node kinds in
:mod:`streamq.nodes`.
"""

__version__ = "0.1.0"
