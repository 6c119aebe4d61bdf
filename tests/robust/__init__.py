"""Robustness suite: every bad input gets exit 2 and one clear line, and loses nothing.

One module per input surface (graph files, audio files, index files, command-line
arguments, live devices), plus faults (full disk, files changing under a run, a
failing design worker, a JACK server that dies) and security. Hypothesis example
counts scale with STREAMQ_ROBUST_EXAMPLES (default 1.0; e.g. 10 for a long run).
"""
