"""Forecasters against statsmodels, and one generic check suite run over every forecaster."""

import copy
import warnings

import numpy as np
import pytest
from river import datasets
from statsmodels.tsa.holtwinters import ExponentialSmoothing, Holt

from streamdet.core.blend import Blend
from streamdet.core.forecast import DampedHolt, HoltWinters, Profile, SeasonalNaive, StreamingMedian
from streamdet.core.forecast.base import StepContext

AIRLINE = np.array([y for _, y in datasets.AirlinePassengers()], dtype=float)  # ships with river


def one_step_forecasts(f, contexts, y):
    out = []
    for ctx, v in zip(contexts, y, strict=True):
        pred, _ready = f.predict(ctx)
        out.append(pred[0, 0])
        f.update(ctx, np.array([v]))
    return np.array(out)


def test_damped_holt_matches_statsmodels_on_airline():
    # Reference: statsmodels Holt with fixed parameters and known initial state; the recursions are
    # the published ones (Hyndman & Athanasopoulos, FPP, section 8.2).
    a, b, phi = 0.3, 0.1, 0.95
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = Holt(AIRLINE, damped_trend=True, initialization_method="known", initial_level=110.0,
                   initial_trend=2.0).fit(smoothing_level=a, smoothing_trend=b, damping_trend=phi,
                                          optimized=False)
    f = DampedHolt(1, alpha=a, beta=b, phi=phi)
    f.level[0], f.trend[0], f.n[0], f.last[0] = 110.0, 2.0, 10**6, -1.0
    ours = one_step_forecasts(f, StepContext.sequence(len(AIRLINE)), AIRLINE)
    np.testing.assert_allclose(ours, ref.fittedvalues, rtol=1e-6)


def test_additive_holt_winters_matches_statsmodels_on_airline():
    # Reference: statsmodels ExponentialSmoothing (additive trend and season, damped), fixed
    # parameters, known initial state (FPP section 8.3). Period 12 stands in for hour-of-week.
    a, b, g, phi = 0.3, 0.1, 0.2, 0.95
    s0 = np.array([-10, -15, 5, 2, -3, 12, 30, 28, 10, -12, -25, -12], float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = ExponentialSmoothing(AIRLINE, trend="add", seasonal="add", seasonal_periods=12,
                                   damped_trend=True, initialization_method="known", initial_level=120.0,
                                   initial_trend=1.5, initial_seasonal=s0).fit(
            smoothing_level=a, smoothing_trend=b, smoothing_seasonal=g, damping_trend=phi, optimized=False)
    f = HoltWinters(1, profiles=(Profile(12),), alpha=a, beta=b, phi=phi, gamma=g)
    f.level[0], f.trend[0], f.n[0], f.last[0] = 120.0, 1.5, 10**6, -1.0
    f.s12[0] = s0
    ours = one_step_forecasts(f, StepContext.sequence(len(AIRLINE), period=12), AIRLINE)
    np.testing.assert_allclose(ours, ref.fittedvalues, rtol=1e-6)


# ---------------------------------------------------------------- generic checks

FACTORIES = {
    "holt": lambda n: DampedHolt(n),
    "seasonal": lambda n: HoltWinters(n),
    "lags": lambda n: SeasonalNaive(n, resolution=3600),
    "median": lambda n: StreamingMedian(n),
}


def contexts(n_rows, n_steps, step=600.0):
    rows = np.arange(n_rows, dtype=np.int64)
    for i in range(n_steps):
        start = np.full(n_rows, 1.7e9 + i * step)
        yield StepContext.build(rows, np.zeros(n_rows, np.int64), start, np.full(n_rows, step),
                                np.full(n_rows, i * step))


def feed(f, n_rows=3, n_steps=2200, seed=0):
    rng = np.random.default_rng(seed)
    last = None
    for ctx in contexts(n_rows, n_steps):
        y = 50 + 10 * np.sin(ctx.start / 86400 * 2 * np.pi) + rng.normal(size=n_rows) + np.arange(n_rows)
        f.update(ctx, y)
        last = ctx
    return last


@pytest.fixture(params=sorted(FACTORIES))
def factory(request):
    return FACTORIES[request.param]


def test_state_round_trips(factory):
    f = factory(3)
    ctx = feed(f)
    g = factory(0)
    g.load(f.state(3), 3)
    np.testing.assert_array_equal(f.predict(ctx)[0], g.predict(ctx)[0])
    np.testing.assert_array_equal(f.predict(ctx)[1], g.predict(ctx)[1])


def test_memory_is_bounded(factory):
    f = factory(3)
    before = {k: v.shape for k, v in f.state(3).items()}
    feed(f, n_steps=3000)
    assert {k: v.shape for k, v in f.state(3).items()} == before
    assert f.bytes_per_row() <= 1024


def test_predict_mutates_neither_state_nor_input(factory):
    f = factory(3)
    ctx = feed(f)
    state = copy.deepcopy(f.state(3))
    ctx_rows = ctx.rows.copy()
    f.predict(ctx)
    for k, v in f.state(3).items():
        np.testing.assert_array_equal(v, state[k])
    np.testing.assert_array_equal(ctx.rows, ctx_rows)


def test_rows_are_independent(factory):
    # Updating one series must not change another's forecast (column-wise correctness).
    f = factory(3)
    ctx = feed(f)
    before = f.predict(ctx)[0][:, 1].copy()
    sub = StepContext.build(ctx.rows[[0]], ctx.rule[[0]], ctx.start[[0]] + 600, np.full(1, 600.0),
                            ctx.age[[0]] + 600)
    f.update(sub, np.array([1e6]))
    np.testing.assert_array_equal(f.predict(ctx)[0][:, 1], before)


def test_becomes_ready_and_tracks_the_level(factory):
    f = factory(3)
    ctx = feed(f)
    pred, ready = f.predict(ctx)
    assert ready.all()
    truth = 50 + 10 * np.sin(ctx.start / 86400 * 2 * np.pi) + np.arange(3)
    assert np.all(np.abs(pred - truth) < 12)


def test_shift_moves_the_forecast(factory):
    f = factory(3)
    ctx = feed(f)
    before = f.predict(ctx)[0].copy()
    f.shift(ctx.rows, np.array([100.0, 0.0, -5.0]))
    after = f.predict(ctx)[0]
    np.testing.assert_allclose(after - before, np.broadcast_to([100.0, 0.0, -5.0], before.shape), atol=1e-3)


def test_fixed_share_tracks_the_better_member():
    # Herbster & Warmuth (1998): the weight moves to the member with the lower loss, and
    # fixed share lets a member that becomes good again regain weight.
    b = Blend(1, members=("a", "b"), learning_rate=0.5, share=0.02)
    rows = np.array([0])
    ready = np.ones((2, 1), bool)
    for _ in range(30):
        b.update(rows, np.zeros(1, np.int64), np.array([[0.0], [5.0]]), ready, np.array([0.0]), np.ones(1))
    _, w, _ = b.combine(rows, np.zeros((2, 1)), ready)
    assert w[0, 0] > 0.95
    for _ in range(30):
        b.update(rows, np.zeros(1, np.int64), np.array([[0.0], [5.0]]), ready, np.array([5.0]), np.ones(1))
    _, w, _ = b.combine(rows, np.zeros((2, 1)), ready)
    assert w[1, 0] > 0.95
    # A member that is not ready gets no weight and keeps its stored weight.
    partial = np.array([[True], [False]])
    centre, w, _ = b.combine(rows, np.array([[1.0], [9.0]]), partial)
    assert centre[0] == 1.0 and w[1, 0] == 0.0
