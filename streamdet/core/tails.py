"""Calibrated band edges and tail probabilities from each series' own residuals, per side.

Residuals are normalised by the residual scale (``z = (y - expected) / scale``). Above a fixed
threshold ``u`` (``THRESHOLD`` scales) the excesses of each side are modelled by a generalized
Pareto distribution -- peaks over threshold (Pickands 1975; its streaming use for anomaly
thresholds: Siffer et al., KDD 2017). The fit is the method of moments of Hosking & Wallis
(1987) over running first and second moments of the excesses, so the state is a few numbers per
side. With ``zeta`` the fraction of steps beyond ``u``:

    P(Z > z) = zeta * (1 + xi * (z - u) / sigma) ** (-1 / xi)      for z > u

and the band edge for a one-sided rarity ``q`` is its inverse. Below ``u`` the normal shape is
assumed, scaled to the observed ``zeta``. Every statistic starts at the value it has for
normal noise and learns as a running mean with a prior weight, so a young series gets a
normal band and a heavy-tailed or skewed one widens its edges (each side separately) as its
tail is observed. Excesses are capped at a few times the current edge's excess before they are
learned, so a single huge spike cannot fatten the tail.

>>> import numpy as np
>>> xi, sigma = gpd_from_moments(np.array([0.4387]), np.array([0.3420]))
>>> round(float(tail_quantile(np.array([NORMAL_ZETA]), xi, sigma, 0.00135)[0]), 2)  # ~3 sd
3.0
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
from scipy.special import ndtr

from streamdet.core.columns import ColumnSpec, ColumnState, row_numbers

THRESHOLD = 1.5  # u: excesses are counted beyond 1.5 residual scales (93rd percentile of N(0,1))
# Normal noise beyond u = 1.5 (scipy.stats.truncnorm(1.5, inf)): the priors every series starts at.
NORMAL_ZETA = 0.0668072  # P(Z > 1.5)
NORMAL_M1 = 0.43866  # E[Z - u | Z > u]
NORMAL_M2 = 0.34197  # E[(Z - u)^2 | Z > u]
Z_CLIP = 4.0  # residuals are clipped here before they teach the autocorrelation
DEPENDENCE_PRIOR = 100.0  # pseudo-steps at zero autocorrelation
DEPENDENCE_MEMORY = 2000.0  # steps
ZETA_PRIOR = 300.0  # pseudo-steps behind the prior exceedance rate
EXCESS_PRIOR = 50.0  # pseudo-exceedances behind the prior excess moments
ZETA_MEMORY = 50_000.0  # steps: effective memory of the exceedance rate once learnt
EXCESS_MEMORY = 3_000.0  # exceedances: effective memory of the excess moments
EXCESS_CAP = 6.0  # an excess is learnt up to this many times the current edge's excess
XI_RANGE = (-0.45, 0.45)  # the method of moments needs a finite variance (xi < 1/2)
P_FLOOR = 1e-300


def gpd_from_moments(m1: np.ndarray, m2: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Shape ``xi`` and scale ``sigma`` of a generalized Pareto distribution from the first two
    raw moments of the excesses (Hosking & Wallis 1987, method of moments), ``xi`` clipped to
    ``XI_RANGE``. scipy.stats.genpareto uses the same sign convention (``c = xi``)."""
    m1 = np.maximum(m1, 1e-12)
    var = np.maximum(m2 - m1 * m1, 1e-24)
    ratio = m1 * m1 / var
    xi = np.clip(0.5 * (1.0 - ratio), *XI_RANGE)
    # sigma = m1 (1 - xi): consistent with the clipped xi
    sigma = np.maximum(m1 * (1.0 - xi), 1e-12)
    return xi, sigma


# The fit of the priors (from the moments as stored, 32-bit): every series starts here.
NORMAL_XI, NORMAL_SIGMA = (float(v[0]) for v in gpd_from_moments(
    np.array([NORMAL_M1], np.float32).astype(np.float64),
    np.array([NORMAL_M2], np.float32).astype(np.float64)))


def tail_quantile(zeta: np.ndarray, xi: np.ndarray, sigma: np.ndarray,
                  q: np.ndarray | float) -> np.ndarray:
    """``z`` with ``P(Z > z) = q``; never below the threshold (the body is not modelled)."""
    log_ratio = np.log(np.maximum(zeta / q, 1.0))
    small = np.abs(xi) < 1e-6
    if small.any():  # the exponential tail, the limit as xi -> 0
        safe_xi = np.where(small, 1.0, xi)
        with np.errstate(over="ignore"):
            excess = np.where(small, log_ratio, np.expm1(safe_xi * log_ratio) / safe_xi)
    else:
        with np.errstate(over="ignore"):
            excess = np.expm1(xi * log_ratio) / xi
    return THRESHOLD + sigma * excess


def tail_prob(z: np.ndarray, zeta: np.ndarray, xi: np.ndarray, sigma: np.ndarray,
              edge: np.ndarray | None = None) -> np.ndarray:
    """``P(Z >= z)`` for the side's tail model (upper side; pass ``-z`` for the lower one).

    A fitted light tail (``xi < 0``) has a finite end point, which would make any value beyond
    it infinitely surprising. Beyond ``edge`` (the band edge) such a tail is continued
    exponentially with the GPD's own local scale there, ``sigma + xi * (edge - u)``: continuous
    at the edge, never zero, and close to the normal tail for normal noise.
    """
    z = np.asarray(z, dtype=np.float64)
    return _side_prob(ndtr(-z), z, zeta, xi, sigma, edge)


def side_probs(score: np.ndarray, zeta: np.ndarray, xi: np.ndarray, sigma: np.ndarray,
               edge: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`tail_prob` of both sides at once (parameters shaped ``(rows, 2)``: above, below):
    ``P(Z >= score)`` from the upper tail and ``P(Z <= score)`` from the lower one. The normal
    body needs one evaluation of the normal tail for both sides (the far side gets its
    complement, which is at least one half there, so nothing is lost to rounding)."""
    near = ndtr(-np.abs(score))
    far = 1.0 - near
    above = score >= 0
    return (_side_prob(np.where(above, near, far), score, zeta[:, 0], xi[:, 0], sigma[:, 0], edge[:, 0]),
            _side_prob(np.where(above, far, near), -score, zeta[:, 1], xi[:, 1], sigma[:, 1], edge[:, 1]))


def _side_prob(normal_tail: np.ndarray, z: np.ndarray, zeta: np.ndarray, xi: np.ndarray,
               sigma: np.ndarray, edge: np.ndarray | None) -> np.ndarray:
    """One side's probability given the normal tail ``P(N >= z)`` of each row (see tail_prob)."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        p = np.minimum(zeta * normal_tail * (1.0 / NORMAL_ZETA), 1.0)
    far = np.flatnonzero(z > THRESHOLD)  # a few percent of the steps: the tail model there only
    if far.shape[0]:
        zf, xf, sf = z[far], xi[far], sigma[far]
        light = (xf < 0) & (zf > edge[far]) if edge is not None else np.zeros(far.shape[0], bool)
        z_fit = np.where(light, edge[far], zf) if edge is not None else zf
        e = (z_fit - THRESHOLD) / sf
        small = np.abs(xf) < 1e-6
        safe_xi = np.where(small, 1.0, xf)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            base = 1.0 + safe_xi * e
            tail = np.where(small, np.exp(-e),
                            np.where(base > 0, np.exp(-np.log(base) / safe_xi), 0.0))
            local = np.maximum(sf + xf * (z_fit - THRESHOLD), 0.1 * sf)
            tail = np.where(light, tail * np.exp(-(zf - z_fit) / local), tail)
        p[far] = zeta[far] * tail
    return np.maximum(p, P_FLOOR)


class TailModel(ColumnState):
    """Per-series, per-side tail state; side 0 is above the expected value, side 1 below."""

    prefix = "tails"
    COLUMNS: ClassVar[ColumnSpec] = {
        "zeta": ("f4", (2,), NORMAL_ZETA),
        "m1": ("f4", (2,), NORMAL_M1),
        "m2": ("f4", (2,), NORMAL_M2),
        "n_excess": ("f4", (2,), 0.0),
        # the GPD fit of m1, m2 (kept beside them: it changes only when an excess is learnt)
        "xi": ("f4", (2,), NORMAL_XI),
        "sigma": ("f4", (2,), NORMAL_SIGMA),
        "n": ("f4", (), 0.0),
        # lag-one autocorrelation of the normalised residuals (for combining evidence)
        "z_prev": ("f4", (), 0.0),  # the previous residual, clipped
        "c01": ("f4", (), 0.0),  # running mean of z_t * z_t-1
        "c00": ("f4", (), 1.0),  # running mean of z_t^2
    }

    def rho(self, r: slice | np.ndarray) -> np.ndarray:
        """Learnt lag-one correlation of the normalised residuals (may be negative)."""
        return self.c01[r] / np.maximum(self.c00[r].astype(np.float64), 1e-6)

    def params(self, r: slice | np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``zeta, xi, sigma`` shaped ``(rows, 2)``."""
        return (self.zeta[r].astype(np.float64), self.xi[r].astype(np.float64),
                self.sigma[r].astype(np.float64))

    def load(self, arrays: dict[str, np.ndarray], n: int) -> None:
        """As :meth:`ColumnState.load`; the fit is derived again for snapshots taken without it."""
        key = f"{self.prefix}.xi"
        if key not in arrays and f"{self.prefix}.m1" in arrays:
            xi, sigma = gpd_from_moments(arrays[f"{self.prefix}.m1"].astype(np.float64),
                                         arrays[f"{self.prefix}.m2"].astype(np.float64))
            arrays = {**arrays, key: xi, f"{self.prefix}.sigma": sigma}
        super().load(arrays, n)

    def update(self, r: slice | np.ndarray, z: np.ndarray, edge: np.ndarray,
               in_run: np.ndarray, mask: np.ndarray) -> None:
        """Learn from normalised residuals ``z`` (rows,); ``edge`` (rows, 2) are the current band
        edges in scale units (upper, lower), used to cap what one excess can teach: up to
        ``EXCESS_CAP`` times the edge's excess, or up to the edge itself for steps of a run
        outside the band (an incident in the making is not tail behaviour). Only rows where
        ``mask`` holds learn; every row remembers its newest residual for the autocorrelation."""
        zs = np.stack([z, -z], axis=1)
        n = self.n[r].astype(np.float64)[:, None]
        m = mask[:, None]
        over = (zs > THRESHOLD) & m
        g = np.where(m, np.maximum(1.0 / (n + ZETA_PRIOR + 1.0), 1.0 / ZETA_MEMORY), 0.0)
        zeta = self.zeta[r].astype(np.float64)
        self.zeta[r] = zeta + g * (over - zeta)
        zc = np.clip(z, -Z_CLIP, Z_CLIP)
        gd = np.where(mask, np.maximum(1.0 / (n[:, 0] + DEPENDENCE_PRIOR + 1.0), 1.0 / DEPENDENCE_MEMORY),
                      0.0)
        c01 = self.c01[r].astype(np.float64)
        c00 = self.c00[r].astype(np.float64)
        self.c01[r] = c01 + gd * (zc * self.z_prev[r] - c01)
        self.c00[r] = c00 + gd * (zc * zc - c00)
        self.z_prev[r] = zc
        i, side = np.nonzero(over)  # a few percent of the rows: learn the excesses there only
        if i.shape[0]:
            rows = row_numbers(r)[i]
            cap = np.maximum(edge[i, side] - THRESHOLD, 0.5) * np.where(in_run[i], 1.0, EXCESS_CAP)
            x = np.minimum(zs[i, side] - THRESHOLD, cap)
            ne = self.n_excess[rows, side].astype(np.float64)
            ge = np.maximum(1.0 / (ne + EXCESS_PRIOR + 1.0), 1.0 / EXCESS_MEMORY)
            m1 = self.m1[rows, side].astype(np.float64)
            m2 = self.m2[rows, side].astype(np.float64)
            m1 = m1 + ge * (x - m1)
            m2 = m2 + ge * (x * x - m2)
            self.m1[rows, side] = m1
            self.m2[rows, side] = m2
            self.n_excess[rows, side] = ne + 1.0
            self.xi[rows, side], self.sigma[rows, side] = gpd_from_moments(
                self.m1[rows, side].astype(np.float64), self.m2[rows, side].astype(np.float64))
        self.n[r] = np.where(mask, np.minimum(n[:, 0] + 1.0, 1e9), n[:, 0])
