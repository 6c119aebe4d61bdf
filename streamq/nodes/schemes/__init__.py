"""Adaptive schemes of the encoder, one small module each, with a scipy-shaped
core (state in, state out) shared by every host.

``step``
    backward step adaptation sample by sample (no side information).
``gain``
    forward gain adaptation block by block (gain index as side information).
"""
