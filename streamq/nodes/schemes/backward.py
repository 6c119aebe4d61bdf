"""Model-fit backward adaptation (``adapt = "backward"``): every hop, fit the
model's mean and scale to the *decoded* past and redesign; the encoder runs it
on its shadow decoder's output, the decoder on its own, so both reach the same
codebooks with no side information."""

from __future__ import annotations

from typing import Any

import numpy as np

from streamq.nodes.coding import _design, _opts, model_codebook, unit_design


class BackwardAdapter:
    """Backward adaptation: every ``hop`` samples, fit the model's scale and
    mean to the *decoded* past and redesign. The encoder runs it on its shadow
    decoder's output, the decoder on its own output, so both reach the same
    codebooks with no side information.

    A quantizer designed for the model at scale ``sigma`` decodes the model's
    samples to a signal of variance ``sigma**2 * V``, ``V`` the decoded
    variance of the unit design on the unit model (``1 - D`` for Lloyd-Max,
    ``D`` its MSE, by the centroid condition; above 1 for a uniform
    quantizer's wide outer levels), so a decoded stretch of variance ``v``
    gives the scale ``sqrt(v / V)``. The new scale is the largest of:

    * window: the estimate from the last ``window`` decoded samples (their
      mean is also the new codebook's centre);
    * attack: the estimate from the hop just coded alone, so an onset is
      not averaged with the quiet window before it;
    * overload: a saturated quantizer decodes to its outer levels, so its
      decoded variance is bounded by them and says little about how far
      the input went. When the share of the hop decoded to *either* outer
      level is well above the share the model predicts at the scale in
      force (by more than ``OVER_Z`` binomial standard deviations), the new
      scale is the one at which the model predicts the observed share, at
      most ``GROW`` times the scale in force (a hop that decoded wholly to
      outer levels gets ``GROW``). A DC offset beyond the first codebook
      (one outer level only) is the one-sided case of the same rule. With
      two levels both are outer and every sample decodes to one of them, so
      the rule is off (a 1-bit backward quantizer cannot learn a scale);
    * decay: the scale in force times ``DECAY ** (hop / window)``: the scale
      falls by at most ``DECAY`` per window length, so a pause (digital
      silence decodes to one level, of variance zero) does not pull it down
      to nothing before the next onset;
    * floor: ``REL_FLOOR`` times the decoded window's RMS (and at least
      2**-20), so a constant input keeps a codebook wide enough to follow
      small changes.

    Every rule sees only decoded samples and the codebook in force, so the
    two ends stay in step. Backward estimation of the scale from the
    quantizer's output, and expanding it on outer-level codes, are the
    classic adaptive quantizer's ideas [1]_, [2]_; the rules above apply them
    a hop at a time (vectorised) instead of a sample at a time.

    References
    ----------
    .. [1] N. S. Jayant, "Adaptive quantization with a one-word memory,"
       Bell System Technical Journal, vol. 52, no. 7, pp. 1119-1144, 1973.
    .. [2] N. S. Jayant and P. Noll, *Digital Coding of Waveforms: Principles
       and Applications to Speech and Video*, Prentice-Hall, 1984, ch. 4.
    """

    GROW = 16.0
    OVER_Z = 3.0
    DECAY = 0.125
    REL_FLOOR = 2.0 ** -8
    #: points of the table that inverts the model's outer share (log-spaced ratios 1..GROW)
    _TABLE = 256

    def __init__(self, coding: dict[str, Any], channels: int):
        self.method = coding["method"]
        self.L = int(coding["levels"])
        self.W = int(coding["window"])
        self.H = int(coding["hop"])
        self.model = coding["model"]
        self.shape = coding.get("shape")
        self.opts = dict(coding.get("options", {}))
        self.floor = 2.0 ** -20
        shape = None if self.shape is None else round(float(self.shape), 2)
        th, lv, _ = unit_design(self.method, self.L, self.model, shape,
                                tuple(sorted(_opts(self.method, self.opts).items())))
        unit = _design().pdf_model(self.model, 0.0, 1.0, shape)
        p, _, _ = unit.partial_moments(np.concatenate(([-np.inf], th)),
                                       np.concatenate((th, [np.inf])))
        v = float(np.dot(p, lv * lv) - np.dot(p, lv) ** 2)
        self.v_unit = min(max(v, 0.01), 100.0)
        self.decay = float(self.DECAY ** (self.H / self.W))
        # the outer share the model predicts when the input's scale is r times the
        # codebook's: non-decreasing in r, from the design's own share at r = 1
        self.ratios = np.geomspace(1.0, self.GROW, self._TABLE)
        self.shares = self._outer_share(unit, th, self.ratios)
        self.hist = np.zeros((self.W, channels))
        self.seen = 0
        scale = float(coding["scale"])
        init = model_codebook(self.method, self.L, self.model, 0.0, scale, self.shape, self.opts)
        self.current = [init] * channels
        self.std = [scale] * channels                    # scale of the codebook in force
        self.hits = np.zeros((channels, 3), np.int64)    # this hop: [bottom, top, samples]

    @staticmethod
    def _outer_share(unit, th: np.ndarray, ratios: np.ndarray) -> np.ndarray:
        """Probability of the two outer cells of the unit design ``th`` when the
        model's scale is ``ratios`` times the design's (vectorised over ratios)."""
        if th.size == 0:
            return np.ones_like(ratios)
        lo = np.asarray(unit.cdf(th[0] / ratios), dtype=np.float64)
        hi = np.asarray(unit.sf(th[-1] / ratios), dtype=np.float64)
        return np.maximum.accumulate(np.clip(lo + hi, 0.0, 1.0))

    def overload_ratio(self, outer: int, n: int) -> float:
        """How many times the scale in force the input's scale is, judged from
        ``outer`` of ``n`` samples decoded to an outer level; 0 (no evidence)
        when that count is within ``OVER_Z`` binomial standard deviations (plus
        ``OVER_Z**2``) of the count the model predicts for the codebook in force.

        Parameters
        ----------
        outer : int
            Samples of the hop that decoded to the bottom or the top level.
        n : int
            Samples in the hop.

        Returns
        -------
        float
            A ratio in [1, ``GROW``], or 0.
        """
        if self.L <= 2 or n <= 0:
            return 0.0
        p0 = float(self.shares[0])
        # the z**2 term keeps the bound valid for the few outer samples a hop
        # expects from a fine quantizer (a count near 2 is far from normal)
        z = self.OVER_Z
        if outer <= n * p0 + z * np.sqrt(n * p0 * (1.0 - p0)) + z * z:
            return 0.0
        share = outer / n
        if share >= self.shares[-1]:
            return self.GROW
        # first table point whose predicted share reaches the observed one, then
        # linear interpolation in log ratio (the table is non-decreasing)
        k = int(np.searchsorted(self.shares, share, side="left"))
        s0, s1 = float(self.shares[k - 1]), float(self.shares[k])
        f = 0.0 if s1 <= s0 else (share - s0) / (s1 - s0)
        r0, r1 = np.log(self.ratios[k - 1]), np.log(self.ratios[k])
        return float(np.exp(r0 + f * (r1 - r0)))

    def _push(self, ch: int, dec: np.ndarray) -> None:
        n = dec.shape[0]
        h = self.hist[:, ch]
        if n == 0:
            return
        lv = self.current[ch].levels
        self.hits[ch] += (np.count_nonzero(dec == lv[0]), np.count_nonzero(dec == lv[-1]), n)
        if n >= self.W:
            h[:] = dec[-self.W:]
        else:
            h[:-n] = h[n:]
            h[-n:] = dec

    def _redesign(self, ch: int, t: int):
        have = min(self.W, t)
        win = self.hist[self.W - have:, ch]
        mean = float(win.mean())
        var = float(np.mean((win - mean) ** 2))
        bottom, top, n = (int(v) for v in self.hits[ch])
        hop = self.hist[self.W - min(n, have):, ch]
        hop_var = float(np.mean((hop - mean) ** 2)) if hop.size else 0.0
        std = max(np.sqrt(max(var, hop_var) / self.v_unit),
                  self.decay * self.std[ch],
                  self.overload_ratio(bottom + top, n) * self.std[ch],
                  self.floor, self.REL_FLOOR * np.sqrt(var + mean * mean))
        self.hits[ch] = 0
        self.std[ch] = std
        return model_codebook(self.method, self.L, self.model, mean, std, self.shape, self.opts)

    def run(self, ch: int, start: int, n: int, segment) -> list[tuple[int, Any]]:
        """Process samples [start, start+n) of channel ``ch``.

        ``segment(a, b, codebook)`` handles the relative range [a, b) with
        ``codebook`` and returns the decoded samples. Returns the codebooks
        designed at hop boundaries t (start < t <= start+n) as (t, codebook).
        """
        out = []
        pos = 0
        first = (start // self.H + 1) * self.H
        for t in range(first, start + n + 1, self.H):
            dec = segment(pos, t - start, self.current[ch])
            self._push(ch, dec)
            pos = t - start
            self.current[ch] = self._redesign(ch, t)
            out.append((t, self.current[ch]))
        if pos < n:
            self._push(ch, segment(pos, n, self.current[ch]))
        return out

    def get_state(self):
        return {"hist": self.hist.copy(), "current": list(self.current), "std": list(self.std),
                "hits": self.hits.copy()}

    def set_state(self, state):
        self.hist = state["hist"].copy()
        self.current = list(state["current"])
        self.std = list(state["std"])
        self.hits = state["hits"].copy()
