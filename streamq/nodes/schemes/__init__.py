"""Adaptive schemes of the encoder, one small module each, with a scipy-shaped
core (state in, state out) shared by every host.

``window``
    trailing and lookahead designs from an estimator's windows (side
    information: the codebook's levels).
``backward``
    model fit to the decoded past every hop, mirrored by the decoder.
``step``
    backward step adaptation sample by sample (no side information).
``gain``
    forward gain adaptation block by block (gain index as side information).
"""
