"""Evidence over the last few steps: Fisher's method of combining tail probabilities, per side.

Fisher (1925): for ``k`` independent p-values, ``X = -2 * sum(ln p_i)`` follows a chi-squared
distribution with ``2k`` degrees of freedom, so one step far in the tail, or several moderately
unusual steps in a row, both give a small combined p, while isolated mildly unusual steps do not.
Each series keeps a ring of its last ``confirm.steps`` judged steps (``-ln p`` of the side with
the smaller tail probability, signed by side, 16-bit) and the running sum of each side.
A step on the other side counts as ``p = 1`` for this side (conservative: it only under-counts).

Forecast residuals of real metrics are autocorrelated, and Fisher's method assumes independent
p-values: a slow wobble would look like several independent unusual steps. Brown's method
(Brown 1975) keeps the statistic but scales it, ``X / c`` against chi-squared with ``f`` degrees
of freedom, where ``c = Var(X) / (2 E[X])`` and ``f = 2 E[X]^2 / Var(X)``. The covariance of
``-2 ln p`` for two normal scores with correlation ``rho`` is taken from Kost & McDermott (2002),
``3.263 rho + 0.710 rho^2 + 0.027 rho^3`` (coefficients from memory of that paper), with
``rho^d`` between steps ``d`` apart (a first-order autoregression whose lag-one correlation each
series learns from its own normalised residuals: ``TailModel.rho`` in
:mod:`streamdet.core.tails`). With ``rho = 0`` it is Fisher's method.

>>> import numpy as np
>>> from scipy.stats import combine_pvalues
>>> ps = [0.01, 0.2, 0.5]
>>> round(float(fisher_p(np.array([-2 * np.log(ps).sum()]), 3)[0]), 4)
0.0318
>>> round(float(combine_pvalues(ps, method="fisher").pvalue), 4)
0.0318
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
from scipy.special import gammaincc, gammaln
from scipy.stats import chi2

from streamdet.core.columns import ColumnSpec, ColumnState, row_numbers, take

MAX_WINDOW = 32
RHO_MAX = 0.9  # the lag-one correlation used is clipped to [0, RHO_MAX]
NEG_LOG_CAP = 650.0  # -ln p is stored up to this (p >= ~1e-282); float16 holds it to 3 digits


def fisher_p(statistic: np.ndarray, k: np.ndarray | int) -> np.ndarray:
    """Combined p-value of Fisher's statistic ``X`` over ``k`` p-values: ``P(chi2_2k >= X)``,
    which is the regularised upper incomplete gamma function ``Q(k, X / 2)``."""
    return gammaincc(np.asarray(k, dtype=np.float64), np.asarray(statistic, dtype=np.float64) / 2.0)


def fisher_surprise(statistic: np.ndarray, k: np.ndarray | int) -> np.ndarray:
    """``-log10`` of :func:`fisher_p`, finite even where the p-value underflows (leading term of
    the series ``Q(k, x) = e^-x sum_{j<k} x^j / j!``)."""
    stat = np.asarray(statistic, dtype=np.float64)
    k = np.broadcast_to(np.asarray(k, dtype=np.float64), stat.shape)
    p = fisher_p(stat, k)
    x = stat / 2.0
    with np.errstate(divide="ignore", invalid="ignore"):
        approx = (x - (k - 1) * np.log(np.maximum(x, 1e-300)) + gammaln(k)) / np.log(10)
        exact = -np.log10(p)
    return np.where(p > 1e-250, exact, approx)


def brown_scale(rho: np.ndarray, k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Brown's scale ``c`` and degrees of freedom ``f`` for a window of ``k`` steps whose scores
    follow a first-order autoregression with lag-one correlation ``rho`` (arrays, same shape)."""
    rho = np.clip(np.asarray(rho, dtype=np.float64), 0.0, RHO_MAX)
    k = np.asarray(k, dtype=np.float64)
    cov_sum = np.zeros(np.broadcast(rho, k).shape)
    r_d = np.ones_like(cov_sum)
    for d in range(1, int(np.max(k, initial=1))):
        r_d = r_d * rho
        pairs = np.maximum(k - d, 0.0)
        cov_sum += pairs * (3.263 * r_d + 0.710 * r_d**2 + 0.027 * r_d**3)
    mean = 2.0 * k
    var = 4.0 * k + 2.0 * cov_sum
    return var / (2.0 * mean), 2.0 * mean * mean / var


def combined_surprise(statistic: np.ndarray, k: np.ndarray, rho: np.ndarray,
                      largest: np.ndarray | None = None) -> np.ndarray:
    """``-log10`` of the combined p-value of Fisher's statistic over ``k`` steps by Brown's
    method for the correlation ``rho`` (Fisher's own for ``rho = 0``).

    Brown's scaling discounts evidence for the dependence between steps, which is right when
    several moderately unusual steps add up, but a window whose evidence is one extreme step
    was not made by dependence. With ``largest`` (the largest single-step ``-ln p`` of the
    window), the surprise is never below the smaller of Fisher's (independent steps) and
    Tippett's (1931) ``1 - (1 - p_min)^k``, here its Bonferroni bound ``k * p_min``, which holds
    under any dependence. With ``rho = 0`` nothing changes (Brown's is then Fisher's).

    >>> import numpy as np
    >>> one_spike = np.array([2 * 29.9])  # a step with p = 1e-13 and four ordinary ones
    >>> round(float(combined_surprise(one_spike, np.array([5]), np.array([0.43]))[0]), 1)
    5.1
    >>> round(float(combined_surprise(one_spike, np.array([5]), np.array([0.43]),
    ...                               largest=np.array([28.0]))[0]), 1)
    8.4
    """
    c, f = brown_scale(rho, k)
    brown = fisher_surprise(np.asarray(statistic) / c, f / 2.0)
    if largest is None:
        return brown
    tippett = np.maximum(np.asarray(largest) / np.log(10.0) - np.log10(np.asarray(k, dtype=np.float64)), 0.0)
    return np.maximum(brown, np.minimum(fisher_surprise(statistic, k), tippett))


def critical_statistic(alpha: float, k: int) -> float:
    """Smallest ``X`` whose combined p-value is at most ``alpha`` for a window of ``k`` steps."""
    return float(chi2.isf(alpha, 2 * k))


class EvidenceWindow(ColumnState):
    """Ring of signed ``-ln p`` per series (positive: upper side) and each side's running sum."""

    prefix = "evidence"
    COLUMNS: ClassVar[ColumnSpec] = {
        "ring": ("f2", (MAX_WINDOW,), 0.0),
        "pos": ("u1", (), 0),
        "sums": ("f8", (2,), 0.0),
    }
    BY_BUCKET: ClassVar[frozenset[str]] = frozenset({"ring"})

    def add(self, r: slice | np.ndarray, judged: np.ndarray, p_up: np.ndarray, p_lo: np.ndarray,
            window: np.ndarray | int) -> np.ndarray:
        """Push one judged step per row; returns Fisher's statistic per side, shape ``(rows, 2)``.
        Rows not judged keep their state (their statistic is returned unchanged)."""
        if not judged.all():
            act = np.flatnonzero(judged)
            self._push(row_numbers(r)[act], p_up[act], p_lo[act], take(window, act))
            return 2.0 * self.sums[r]
        self._push(r, p_up, p_lo, window)  # (a slice where the wave's rows are contiguous)
        return 2.0 * self.sums[r]

    def _push(self, r: slice | np.ndarray, p_up: np.ndarray, p_lo: np.ndarray,
              window: np.ndarray | int) -> None:
        up_smaller = p_up <= p_lo
        neg = np.minimum(-np.log(np.minimum(p_up, p_lo)), NEG_LOG_CAP)
        new16 = np.where(up_smaller, neg, -neg).astype(np.float16)
        rows = row_numbers(r)
        pos = self.pos[r].astype(np.int64)
        new = new16.astype(np.float64)
        old = self.ring[rows, pos].astype(np.float64)
        # each side's sum gains the new step's -ln p and loses the evicted step's
        sums = self.sums[r]  # a view for a slice: updated in place
        sums[:, 0] += np.maximum(new, 0.0) - np.maximum(old, 0.0)
        sums[:, 1] += np.maximum(-new, 0.0) - np.maximum(-old, 0.0)
        self.sums[r] = np.maximum(sums, 0.0)
        self.ring[rows, pos] = new16
        self.pos[r] = ((pos + 1) % window).astype(np.uint8)

    def largest(self, rows: np.ndarray) -> np.ndarray:
        """The largest single-step ``-ln p`` in each row's window, per side, ``(rows, 2)``."""
        ring = self.ring[rows].astype(np.float64)
        return np.stack([np.maximum(ring.max(axis=1), 0.0), np.maximum(-ring.min(axis=1), 0.0)], axis=1)

    def clear(self, rows: np.ndarray) -> None:
        """Forget the evidence of ``rows`` (after a breach opens or closes)."""
        self.ring[rows] = 0.0
        self.sums[rows] = 0.0
        self.pos[rows] = 0
