"""Peer-group numerics (streamdet.core.peers) against outside references: numpy's median,
scipy.stats.median_abs_deviation, the modified z-score as published, scikit-learn's DBSCAN."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import median_abs_deviation
from sklearn.cluster import DBSCAN
from sklearn.datasets import make_blobs

from streamdet.core.peers import (
    MAD_TO_SD,
    dbscan,
    k_distances,
    knee_eps,
    modified_z,
    segment_median,
    shape_outliers,
)


def _groups(rng, n_groups, lo, hi):
    sizes = rng.integers(lo, hi, n_groups)
    seg = np.repeat(np.arange(n_groups), sizes)
    perm = rng.permutation(seg.shape[0])
    return seg[perm]


def test_segment_median_equals_numpy_median_per_group():
    # reference: numpy.median on each group separately (odd, even, single-member and empty groups)
    rng = np.random.default_rng(1)
    seg = _groups(rng, 300, 1, 12)
    x = rng.standard_t(3, seg.shape[0])
    x[::7] = 0.0  # ties
    got = segment_median(x, seg, 302)
    want = np.array([np.median(x[seg == g]) for g in range(300)])
    np.testing.assert_allclose(got[:300], want, rtol=0, atol=0)
    assert np.isnan(got[300:]).all()


def test_mad_equals_scipy_median_abs_deviation_normal_scale():
    # reference: scipy.stats.median_abs_deviation(scale='normal') is MAD / 0.67449 (the normal
    # consistency constant); our spread is MAD / 0.6745, Iglewicz & Hoaglin's rounding of it
    rng = np.random.default_rng(2)
    seg = _groups(rng, 200, 5, 60)
    x = rng.lognormal(3.0, 0.4, seg.shape[0])
    s = modified_z(x, seg, 200)
    for g in range(200):
        xs = x[seg == g]
        ref_raw = median_abs_deviation(xs)
        ref_normal = median_abs_deviation(xs, scale="normal")
        assert s.mad[g] == pytest.approx(ref_raw, rel=1e-12)
        assert s.spread[g] == pytest.approx(ref_normal, rel=1e-4)
        z_ref = (xs - np.median(xs)) / ref_normal
        np.testing.assert_allclose(s.z[seg == g], z_ref, rtol=1e-4)


def test_modified_z_formula_worked_example():
    # Iglewicz & Hoaglin (1993): M_i = 0.6745 (x_i - median) / MAD, |M_i| > 3.5 a potential
    # outlier (as quoted in the NIST/SEMATECH e-Handbook, section 1.3.5.17; from memory).
    # Hand-worked: x = 1, 2, 3, 4, 100 -> median 3, deviations 2, 1, 0, 1, 97 -> MAD 1,
    # M = -1.349, -0.6745, 0, 0.6745, 65.43; only 100 is beyond 3.5.
    x = np.array([1.0, 2, 3, 4, 100])
    s = modified_z(x, np.zeros(5, np.int64), 1)
    np.testing.assert_allclose(s.z, [-1.349, -0.6745, 0.0, 0.6745, 65.4265], rtol=1e-6)
    assert (np.abs(s.z) > 3.5).tolist() == [False, False, False, False, True]
    assert MAD_TO_SD == 0.6745


def test_cut_off_35_false_rate_on_normal_data():
    # Under normal data |M| > 3.5 should be rare: P(|Z| > 3.5) = 4.7e-4 for the exact sigma
    # (normal table); the sample median/MAD of 50 members adds noise, so allow up to 3e-3
    # (common practice, no source, for the slack).
    rng = np.random.default_rng(3)
    seg = np.repeat(np.arange(4000), 50)
    s = modified_z(rng.normal(100, 5, seg.shape[0]), seg, 4000)
    rate = float(np.mean(np.abs(s.z) > 3.5))
    assert 1e-4 < rate < 3e-3


def test_mad_zero_falls_back_to_mean_absolute_deviation():
    # 40 hosts report 0 errors, one reports 5: MAD = 0, so the spread is 1.253314 * MeanAD
    # (sqrt(pi/2) * mean |x - median| estimates sigma on normal data; Iglewicz & Hoaglin's
    # MeanAD alternative); MeanAD = 5/41.
    x = np.zeros(41)
    x[7] = 5.0
    s = modified_z(x, np.zeros(41, np.int64), 1)
    assert s.mad[0] == 0.0
    assert s.spread[0] == pytest.approx(1.253314 * 5 / 41)
    assert s.z[7] == pytest.approx(5 / (1.253314 * 5 / 41))
    assert np.all(s.z[np.arange(41) != 7] == 0)
    # all identical (also at zero): every score is 0, nothing divides by zero
    with np.errstate(all="raise"):
        for v in (0.0, 1e6):
            s = modified_z(np.full(9, v), np.zeros(9, np.int64), 1)
            assert np.all(s.z == 0) and np.isfinite(s.spread).all()


def test_groups_do_not_leak_into_each_other():
    # the same member set scored alone or among many other groups gives the same scores
    rng = np.random.default_rng(4)
    seg = _groups(rng, 50, 5, 20)
    x = rng.normal(0, 1, seg.shape[0]) * (1 + seg)  # very different spreads per group
    s = modified_z(x, seg, 50)
    for g in (0, 17, 49):
        alone = modified_z(x[seg == g], np.zeros(int((seg == g).sum()), np.int64), 1)
        np.testing.assert_array_equal(alone.z, s.z[seg == g])


# ---------------------------------------------------------------- DBSCAN against scikit-learn


def _sk(x, eps, min_samples):
    return DBSCAN(eps=eps, min_samples=min_samples).fit(x).labels_


@pytest.mark.parametrize("seed", range(6))
def test_dbscan_equals_sklearn_on_random_data(seed):
    # reference: sklearn.cluster.DBSCAN labels on the same vectors and parameters
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(150, 1 + seed))
    for eps in (0.3, 0.8, 1.5):
        for ms in (1, 3, 5):
            got, _ = dbscan(x, eps, ms)
            np.testing.assert_array_equal(got, _sk(x, eps, ms))


def test_dbscan_equals_sklearn_on_blobs_with_noise():
    # reference: sklearn.datasets.make_blobs plus uniform noise, sklearn.cluster.DBSCAN
    x, _ = make_blobs(n_samples=300, centers=4, cluster_std=0.6, random_state=0)
    rng = np.random.default_rng(0)
    x = np.vstack([x, rng.uniform(x.min(), x.max(), size=(30, 2))])
    got, core = dbscan(x, 0.5, 5)
    ref = DBSCAN(eps=0.5, min_samples=5).fit(x)
    np.testing.assert_array_equal(got, ref.labels_)
    np.testing.assert_array_equal(np.flatnonzero(core), ref.core_sample_indices_)
    assert (got == -1).sum() > 0 and got.max() >= 3


def _two_cluster_borders(x, eps, labels, core):
    d = np.sqrt(((x[:, None, :] - x[None, :, :]) ** 2).sum(-1))
    n = 0
    for i in np.flatnonzero(~core & (labels >= 0)):
        near = labels[(d[i] <= eps) & core]
        n += len(set(near.tolist())) > 1
    return n


def test_dbscan_ties_border_points_reachable_from_two_clusters():
    # Integer grid points: distances are exact, many lie at exactly eps (inclusive), and some
    # border points touch core points of two clusters. scikit-learn gives such a point to the
    # cluster its ascending depth-first expansion reaches first; our labels must match, in any
    # input order.
    rng = np.random.default_rng(7)
    seen = 0
    for trial in range(40):
        x = rng.integers(0, 12, size=(60, 2)).astype(float)
        x = x[rng.permutation(60)]
        for eps, ms in ((1.0, 4), (np.sqrt(2.0), 5), (2.0, 6)):
            got, core = dbscan(x, eps, ms)
            np.testing.assert_array_equal(got, _sk(x, eps, ms), err_msg=f"trial {trial} eps {eps}")
            seen += _two_cluster_borders(x, eps, got, core)
    assert seen > 0  # the case under test did occur


def test_dbscan_designed_tie():
    # Two 'plus' shapes on a line with a border point between them at distance 1 from a core
    # point of each (eps 1, min_samples 5: only the centres are core). Listed right cluster
    # first, the border point goes to cluster 0 (the right one), as in scikit-learn.
    right = [(4, 0), (4, 1), (4, -1), (5, 0), (3, 0)]
    left = [(0, 0), (0, 1), (0, -1), (-1, 0), (1, 0)]
    x = np.array([*right, *left, (2, 0)], float)
    got, core = dbscan(x, 1.0, 5)
    # (3,0) and (1,0) are border points; (2,0) reaches neither centre -> noise
    np.testing.assert_array_equal(got, _sk(x, 1.0, 5))
    x = np.array([*right, *left, (2, 0)], float)
    got, _ = dbscan(x, 2.0, 5)
    np.testing.assert_array_equal(got, _sk(x, 2.0, 5))
    x2 = np.array([(4, 0), (4, 1), (4, -1), (5, 0), (0, 0), (0, 1), (0, -1), (-1, 0), (2, 0)], float)
    got, core = dbscan(x2, 2.0, 4)  # (2,0) is within 2 of both centres; not itself core
    assert not core[8] and core[0] and core[4]
    np.testing.assert_array_equal(got, _sk(x2, 2.0, 4))
    assert got[8] == got[0] == 0


def test_dbscan_rejects_bad_parameters():
    with pytest.raises(ValueError, match="eps > 0"):
        dbscan(np.zeros((3, 2)), 0.0, 2)


# ---------------------------------------------------------------- k-distance eps and shapes


def test_k_distances_equal_sklearn_nearest_neighbours():
    # reference: sklearn.neighbors.NearestNeighbors: distance to the k-th neighbour other than
    # the point itself is column k of kneighbors(X, k + 1) (column 0 is the point)
    from sklearn.neighbors import NearestNeighbors
    rng = np.random.default_rng(5)
    x = rng.normal(size=(80, 6))
    for k in (1, 3, 7):
        ref = np.sort(NearestNeighbors(n_neighbors=k + 1).fit(x).kneighbors(x)[0][:, k])
        np.testing.assert_allclose(k_distances(x, k), ref, rtol=1e-10)


def test_knee_eps_separates_blobs_from_noise():
    # The k-distance heuristic of Ester et al. (1996): eps at the knee keeps the blob points
    # core and leaves the scattered points as noise (make_blobs + uniform scatter).
    x, _ = make_blobs(n_samples=200, centers=3, cluster_std=0.5, random_state=3)
    rng = np.random.default_rng(3)
    far = rng.uniform(-30, 30, size=(8, 2))
    x = np.vstack([x, far])
    eps = knee_eps(k_distances(x, 3))
    labels, _ = dbscan(x, eps, 4)
    assert (labels[-8:] == -1).mean() >= 0.75
    assert (labels[:-8] >= 0).mean() >= 0.97
    assert knee_eps(np.zeros(5)) == 1e-9
    assert knee_eps(np.array([1.0, 2.0, 3.0, 4.0])) == 4.0  # straight line: no knee, no noise


def test_shape_outlier_named_despite_fleet_wide_cycle():
    # fictional fleet: 30 members follow one daily cycle with noise; member 11 has the cycle
    # inverted (same level and range). Centring per step removes the shared cycle.
    rng = np.random.default_rng(8)
    t = np.arange(48)
    cycle = 100 + 40 * np.sin(2 * np.pi * t / 48)
    w = cycle + rng.normal(0, 3, size=(30, 48))
    w[11] = 100 - 40 * np.sin(2 * np.pi * t / 48) + rng.normal(0, 3, 48)
    r = shape_outliers(w, 4)
    assert np.flatnonzero(r.outside).tolist() == [11]
    assert r.cluster_sizes[0] == 29
    np.testing.assert_array_equal(r.labels, _sk((w - np.median(w, 0)) / np.median(np.median(np.abs(w - np.median(w, 0)), 0)), r.eps, 4))
    # no odd member: nobody outside
    r = shape_outliers(cycle + rng.normal(0, 3, size=(30, 48)), 4)
    assert not r.outside.any()
