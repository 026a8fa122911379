"""Peer-group numerics: how far each member of a group is from the others at one step.

Pure array code, no state. Per-step scoring is the modified z-score of Iglewicz and Hoaglin
(1993), ``M = 0.6745 (x - median) / MAD``, for every group at once (segment medians over one
sort, no Python loop per group). Shape outliers come from DBSCAN (Ester et al., 1996) over the
members' recent windows, with ``eps`` read off the sorted k-distance curve.

>>> import numpy as np
>>> s = modified_z(np.array([10., 11, 9, 10, 30, 5, 5, 5]), np.array([0, 0, 0, 0, 0, 1, 1, 1]), 2)
>>> s.median.tolist(), s.mad.tolist(), s.count.tolist()
([10.0, 5.0], [1.0, 0.0], [5, 3])
>>> np.round(s.z, 3).tolist()
[0.0, 0.674, -0.674, 0.0, 13.49, 0.0, 0.0, 0.0]
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial.distance import cdist

MAD_TO_SD = 0.6745  # E[MAD] = 0.6745 sigma on normal data (Iglewicz & Hoaglin's constant)
MEANAD_TO_SD = 1.253314  # sigma = sqrt(pi / 2) * E|x - mu| on normal data
RELATIVE_FLOOR = 1e-9  # the spread is never below this fraction of |median| (float noise only)
KNEE_MIN_RATIO = 1.5  # eps is at least this many times the median k-distance (see knee_eps)
NOISE = -1


def segment_starts(seg: np.ndarray, n_seg: int) -> tuple[np.ndarray, np.ndarray]:
    """Start offset and size of each segment once the elements are sorted by segment."""
    count = np.bincount(seg, minlength=n_seg)
    return np.cumsum(count) - count, count


def segment_median(values: np.ndarray, seg: np.ndarray, n_seg: int) -> np.ndarray:
    """Median of ``values`` within each segment ``0 .. n_seg-1`` (NaN for an empty segment).

    One lexicographic sort (segment, value); the median is the mean of the two middle elements
    of each segment's run (the one middle element for an odd size), as ``np.median`` does.

    >>> segment_median(np.array([3., 1, 2, 10, 20]), np.array([0, 0, 0, 1, 1]), 3).tolist()
    [2.0, 15.0, nan]
    """
    order = np.lexsort((values, seg))
    v = values[order]
    start, count = segment_starts(seg, n_seg)
    has = count > 0
    lo = np.where(has, start + (count - 1) // 2, 0)
    hi = np.where(has, start + count // 2, 0)
    if v.shape[0] == 0:
        return np.full(n_seg, np.nan)
    return np.where(has, 0.5 * (v[lo] + v[hi]), np.nan)


@dataclass(slots=True)
class PeerScores:
    """Modified z-scores of members and the group figures they came from."""

    z: np.ndarray  # per member
    median: np.ndarray  # per group
    mad: np.ndarray  # per group: median absolute deviation (raw, unscaled)
    spread: np.ndarray  # per group: the standard-deviation-like scale z divides by
    count: np.ndarray  # per group: members scored


def modified_z(values: np.ndarray, seg: np.ndarray, n_seg: int) -> PeerScores:
    """Modified z-score of every member against its own group (segment), all groups at once.

    ``M = (x - median) / spread`` with ``spread = MAD / 0.6745`` (Iglewicz & Hoaglin, 1993).
    When MAD is 0 (more than half the members share one value) the spread falls back to
    ``1.253314 * MeanAD``, the mean absolute deviation from the median, which estimates the same
    sigma on normal data; when that is 0 too, every member equals the median and scores 0. The
    spread is never below ``RELATIVE_FLOOR * |median|``, so float noise on identical members
    cannot score. Never divides by zero.
    """
    values = np.asarray(values, dtype=np.float64)
    seg = np.asarray(seg, dtype=np.int64)
    median = segment_median(values, seg, n_seg)
    dev = np.abs(values - median[seg])
    mad = segment_median(dev, seg, n_seg)
    count = np.bincount(seg, minlength=n_seg)
    mean_ad = np.bincount(seg, weights=dev, minlength=n_seg) / np.maximum(count, 1)
    spread = np.where(mad > 0, mad / MAD_TO_SD, MEANAD_TO_SD * mean_ad)
    spread = np.maximum(spread, RELATIVE_FLOOR * np.abs(median))
    s = spread[seg]
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(s > 0, (values - median[seg]) / np.where(s > 0, s, 1.0), 0.0)
    return PeerScores(z=z, median=median, mad=mad, spread=spread, count=count)


# ---------------------------------------------------------------- DBSCAN


def dbscan(x: np.ndarray, eps: float, min_samples: int) -> tuple[np.ndarray, np.ndarray]:
    """DBSCAN labels (``-1`` noise) and the core mask of the rows of ``x`` (Ester et al., 1996).

    Euclidean distances; a point's neighbourhood is every point within ``eps`` (inclusive)
    including itself; a core point has at least ``min_samples`` of them. Clusters are the
    connected components of core points, numbered in the order of their lowest-index core point;
    a border point reachable from several clusters joins the lowest-numbered one. That is the
    order in which scikit-learn's depth-first expansion (ascending seeds) reaches it, so labels
    equal ``sklearn.cluster.DBSCAN(eps, min_samples=min_samples).fit(x).labels_``.
    """
    x = np.asarray(x, dtype=np.float64)
    n = x.shape[0]
    if eps <= 0 or min_samples < 1:
        raise ValueError(f"dbscan needs eps > 0 and min_samples >= 1, got {eps!r} and {min_samples!r}")
    labels = np.full(n, NOISE, dtype=np.int64)
    if n == 0:
        return labels, np.zeros(0, dtype=bool)
    near = cdist(x, x) <= eps
    core = near.sum(axis=1) >= min_samples
    ci = np.flatnonzero(core)
    if ci.shape[0] == 0:
        return labels, core
    _, comp = connected_components(csr_matrix(near[np.ix_(ci, ci)]), directed=False)
    # renumber components by their first (lowest-index) core point
    _, first = np.unique(comp, return_index=True)
    rank = np.empty(first.shape[0], dtype=np.int64)
    rank[np.argsort(first, kind="stable")] = np.arange(first.shape[0])
    labels[ci] = rank[comp]
    border = np.flatnonzero(~core & near[:, ci].any(axis=1))
    if border.shape[0]:
        cand = np.where(near[np.ix_(border, ci)], labels[ci][None, :], np.iinfo(np.int64).max)
        labels[border] = cand.min(axis=1)
    return labels, core


def k_distances(x: np.ndarray, k: int) -> np.ndarray:
    """Distance of every row of ``x`` to its ``k``-th nearest other row, sorted ascending.

    ``k`` is at most ``len(x) - 1``.
    """
    d = np.sort(cdist(x, x), axis=1)
    return np.sort(d[:, min(k, x.shape[0] - 1)])


def knee_eps(kdist: np.ndarray, floor: float = 1e-9, min_ratio: float = KNEE_MIN_RATIO) -> float:
    """``eps`` at the knee of the sorted (ascending) k-distance curve.

    The DBSCAN paper reads the threshold off this curve by eye at its first "valley": points to
    its left are in clusters, those to its right noise. Automated here as the point furthest
    below the chord from the first to the last point, with both axes scaled to [0, 1] (for a
    curve that turns upward at the end this is where it bends). A flat curve (no point below
    the chord) has no noise: ``eps`` is its largest value. A smooth curve without a real bend
    still has a point furthest below its chord; so that the top of such a curve (members that
    are merely the least typical of a homogeneous group) is not noise, ``eps`` is at least
    ``min_ratio`` times the median k-distance. Never below ``floor`` (identical vectors still
    form a cluster).

    >>> knee_eps(np.array([1.0, 1.1, 1.2, 1.3, 1.4, 9.0]), min_ratio=0)
    1.4
    >>> knee_eps(np.array([1.0, 1.1, 1.2, 1.3, 1.4, 9.0]))  # 1.5 x median 1.25
    1.875
    """
    kd = np.asarray(kdist, dtype=np.float64)
    n = kd.shape[0]
    if n == 0:
        return floor
    span = kd[-1] - kd[0]
    if n < 3 or span <= 0:
        return max(float(kd[-1]), floor)
    xs = np.linspace(0.0, 1.0, n)
    below = xs - (kd - kd[0]) / span
    i = int(np.argmax(below))
    if below[i] <= 0:
        return max(float(kd[-1]), floor)
    return max(float(kd[i]), min_ratio * float(np.median(kd)), floor)


@dataclass(slots=True)
class ShapeResult:
    """DBSCAN over one group's windows."""

    labels: np.ndarray
    outside: np.ndarray  # bool: not in the largest cluster
    eps: float
    cluster_sizes: list[int]  # largest first; noise not counted
    distance: np.ndarray  # to the nearest core point of the largest cluster, in eps units


def shape_outliers(windows: np.ndarray, min_samples: int) -> ShapeResult:
    """Members (rows of ``windows``, one column per step) outside the group's largest cluster.

    Each step is centred on the group's median at that step (a fleet-wide cycle is no
    difference) and the whole group is scaled by the median of its per-step MAD (so distances
    read in group spreads; DBSCAN's result does not depend on it). ``eps`` comes from the
    k-distance curve with ``k = min_samples - 1`` (the ``k``-th nearest other point: a point
    left of the knee is a core point). Ties for the largest cluster go to the lower label;
    with no cluster at all nobody is outside.
    """
    w = np.asarray(windows, dtype=np.float64)
    n = w.shape[0]
    centred = w - np.median(w, axis=0, keepdims=True)
    scale = float(np.median(np.median(np.abs(centred), axis=0)))
    if not scale > 0:
        scale = float(np.mean(np.abs(centred))) * MEANAD_TO_SD / MAD_TO_SD
    if scale > 0:
        centred = centred / scale
    k = max(1, min(min_samples - 1, n - 1))
    eps = knee_eps(k_distances(centred, k))
    labels, core = dbscan(centred, eps, min_samples)
    sizes = np.bincount(labels[labels >= 0]) if (labels >= 0).any() else np.zeros(0, np.int64)
    if sizes.shape[0]:
        big = int(np.argmax(sizes))
        outside = labels != big
        anchors = centred[core & (labels == big)]
        distance = cdist(centred, anchors).min(axis=1) / eps
    else:  # no cluster at all: nobody stands out from a majority
        outside = np.zeros(n, dtype=bool)
        distance = np.full(n, np.nan)
    return ShapeResult(labels=labels, outside=outside, eps=eps,
                       cluster_sizes=sorted(sizes.tolist(), reverse=True), distance=distance)
