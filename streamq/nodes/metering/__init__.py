"""The parts of the ``error-meter`` node (``streamq.nodes.meter``), one small
module each, every one with its state in one object (``get_state`` hands out
a copy, ``set_state`` takes one back).

``frames``
    frame sums: the compiled pass that cuts the stream into segmental-SNR
    frames, and the totals, segmental SNR and series rows made of them.
``spectrum``
    the signal and noise power spectra (Welch segments, compiled windowing).
``rates``
    the codebooks in force and what they cost: side information and index
    entropy.
``pictures``
    the first, middle and last codebook of channel 0 with a histogram of the
    signal it coded, for the report's plots.
``series``
    a table of rows kept as columns (the meter's and the estimator's series).

``frames`` and ``spectrum`` load numba: the meter imports them when it opens,
so that commands which only read graphs never compile or load a kernel.
"""
