"""The main job checked against outside references: shipped datasets, a handbook fact, and
common practice. Each test names its source."""

from datetime import UTC, datetime

import numpy as np
import statsmodels.api as sm
from river import datasets

from streamdet.events import CLOSED, OPENED
from tests.helpers import run, step_log


def test_waterflow_low_segments_are_flagged():
    # river.datasets.WaterFlow (shipped with river): hourly pipeline flow; its docstring documents
    # three "low value moments" and one small peak. Segment positions below were read off the data
    # (indices of the hourly points); the small peak is a single hour and is not expected with the
    # default 3-of-5 confirmation.
    rows = list(datasets.WaterFlow())
    t = np.array([x["Time"].timestamp() for x, _ in rows])
    y = np.array([v for _, v in rows])
    _eng, events = run({"rules": [{"name": "flow", "step": "auto"}]}, "flow", t, y)
    segments = [(93, 112), (211, 226), (869, 886), (326, 331)]  # last: the small peak
    opened = [int(np.searchsorted(t, e.step_start)) for e in events if e.type == OPENED]
    hit = [any(lo <= i <= hi for i in opened) for lo, hi in segments]
    elsewhere = [i for i in opened if not any(lo <= i <= hi for lo, hi in segments)]
    assert sum(hit) >= 3, (opened, hit)
    # Measured: 3 segments hit, 0 breaches elsewhere.
    assert len(elsewhere) <= 1, elsewhere


def test_nile_level_shift_opens_then_relearns():
    # statsmodels.datasets.nile: annual Nile flow 1871-1970; the drop around 1898-1899 is the
    # standard change-point example (Cobb 1978). Means before/after are ~1098 and ~850 with a
    # standard deviation of ~130, so the shift is under 2 sd: a 3-sd band cannot see it step by
    # step, hence width 1.5 here; relearn after 8 annual steps.
    d = sm.datasets.nile.load_pandas().data
    years = d["year"].astype(int).to_numpy()
    t = np.array([datetime(int(yr), 1, 1, tzinfo=UTC).timestamp() for yr in years])
    cfg = {"rules": [{"name": "nile", "step": "auto", "width": 1.5, "relearn_after": "8 steps"}]}
    eng, events = run(cfg, "nile", t, d["volume"].to_numpy())
    year_of = lambda ts: datetime.fromtimestamp(ts, tz=UTC).year  # noqa: E731
    opened = [year_of(e.step_start) for e in events if e.type == OPENED]
    closed = [year_of(e.step_start) for e in events if e.type == CLOSED]
    assert opened and 1899 <= opened[0] <= 1903, opened
    assert all(o >= 1899 for o in opened)  # nothing before the shift
    assert closed and closed[0] <= 1899 + 8 + 3 + 3, closed  # relearn (8) + clear (3) + slack
    assert eng.counters["relearns"] >= 1
    first_close = next(e for e in events if e.type == CLOSED)
    assert first_close.reason == "the band re-levelled after a lasting shift"
    log = step_log(eng, "nile")
    after = log["expected"][(log["start"] >= datetime(1915, 1, 1, tzinfo=UTC).timestamp())]
    assert abs(np.mean(after) - 850) < 100  # the band re-levelled to the new mean


def test_gaussian_noise_outside_fraction_matches_normal_tail():
    # Handbook fact: P(|Z| > 3) = 0.27 % for a standard normal (two-sided tail, 0.0026998).
    # 30 independent series of i.i.d. N(0,1) at 1-minute steps for 3 weeks, single-step confirm;
    # measured after a one-week burn-in. The band's centre and scale are themselves estimated
    # (hour-of-week buckets see ~60 points a week), and a band from estimated parameters has
    # Student-t rather than normal tails (handbook fact: prediction intervals with an estimated
    # sd). So the fraction must lie between the normal tail and the t tail for 100 degrees of
    # freedom (scipy.stats.t: 0.34 %), each widened by 4 binomial standard deviations.
    # Measured: 0.300 % of 604,770 judged steps.
    from scipy import stats

    rng = np.random.default_rng(7)
    n_series, n_steps = 30, 3 * 10080
    t = np.repeat(np.arange(n_steps) * 60.0 + 1.7e9, n_series)
    keys = [f"g{i}" for i in range(n_series)] * n_steps
    y = rng.standard_normal(n_steps * n_series)
    cfg = {"rules": [{"name": "g", "confirm": {"steps": 1}, "clear": {"steps": 1}}]}
    eng, _ = run(cfg, keys, t, y, chunk=200_000)
    cols = eng.log.columns()
    keep = cols["judged"].astype(bool) & (cols["start"] >= 1.7e9 + 7 * 86400)
    outside = (cols["observed"] > cols["upper"]) | (cols["observed"] < cols["lower"])
    n = int(keep.sum())
    frac = outside[keep].sum() / n
    normal_tail = 2 * stats.norm.sf(3)
    assert abs(normal_tail - 0.0027) < 1e-5
    t_tail = 2 * stats.t.sf(3, df=100)
    sd = np.sqrt(t_tail * (1 - t_tail) / n)
    assert normal_tail - 4 * sd < frac < t_tail + 4 * sd, (frac, n)


def test_trend_refires_a_fixed_threshold_but_not_streamdet():
    # Common practice (no source): a threshold set on last week's data keeps firing as a metric
    # grows, while a trend-following band stays quiet.
    rng = np.random.default_rng(3)
    n = 3 * 1440
    t = np.arange(n) * 60.0 + 1.7e9
    y = 100 + 0.02 * np.arange(n) + rng.normal(0, 1, n)
    _, events = run({"rules": [{"name": "trend"}]}, "m", t, y)
    threshold = y[:1440].mean() + 4 * y[:1440].std()
    crossings = np.flatnonzero(np.diff((y > threshold).astype(int)) == 1)
    assert len(crossings) > 5
    assert [e for e in events if e.type == OPENED] == []


def _weekday_afternoon_series(weeks: int, unusual_spike_at: float | None):
    # 5-minute steps from Monday 2024-01-01; +20 (20 sd) spike every weekday 14:00-15:00 UTC.
    t0 = datetime(2024, 1, 1, tzinfo=UTC).timestamp()
    t = t0 + np.arange(weeks * 7 * 288) * 300.0
    day = ((t - t0) // 86400).astype(int) % 7
    hour = ((t - t0) % 86400) // 3600
    rng = np.random.default_rng(11)
    y = 50 + rng.normal(0, 1, t.shape[0]) + np.where((day < 5) & (hour == 14), 20.0, 0.0)
    if unusual_spike_at is not None:
        y += np.where((t >= unusual_spike_at) & (t < unusual_spike_at + 3600), 20.0, 0.0)
    return t, y, t0


def test_weekday_spike_learned_unusual_hour_flagged_weekend_flatter():
    # Common practice (no source): a recurring weekday spike is normal after about two weeks, the
    # same spike at an unusual hour is not, and weekends are learned flatter than weekdays.
    weeks = 3
    t0 = datetime(2024, 1, 1, tzinfo=UTC).timestamp()
    unusual = t0 + (2 * 7 + 2) * 86400 + 3 * 3600  # Wednesday of week 3, 03:00
    t, y, t0 = _weekday_afternoon_series(weeks, unusual)
    eng, events = run({"rules": [{"name": "biz", "step": "5m"}]}, "orders", t, y)
    opened = [e.step_start for e in events if e.type == OPENED]
    week3 = t0 + 14 * 86400
    assert any(unusual <= s < unusual + 3600 for s in opened), opened
    assert [s for s in opened if s >= week3 and not unusual <= s < unusual + 3600] == []
    log = step_log(eng, "orders")
    in_week3 = log["start"] >= week3
    hour = ((log["start"] - t0) % 86400) // 3600
    day = ((log["start"] - t0) // 86400).astype(int) % 7
    weekday_2pm = log["expected"][in_week3 & (day < 5) & (hour == 14)].mean()
    weekend_2pm = log["expected"][in_week3 & (day >= 5) & (hour == 14)].mean()
    assert weekday_2pm > 60 and abs(weekend_2pm - 50) < 3, (weekday_2pm, weekend_2pm)


def test_local_time_zone_keeps_a_daily_shape_across_daylight_saving():
    # Reference: the IANA tz database through Python's zoneinfo (Europe/Berlin moved from UTC+1 to
    # UTC+2 on 2024-03-31). A shop's busy hour, 09:00-10:00 local time every day, moves by an hour
    # in UTC at the switch. With `timezone: Europe/Berlin` it stays expected; in UTC it breaches.
    from zoneinfo import ZoneInfo

    berlin = ZoneInfo("Europe/Berlin")
    t0 = datetime(2024, 3, 11, tzinfo=UTC).timestamp()
    t = t0 + np.arange(35 * 288) * 300.0
    local_hour = np.array([datetime.fromtimestamp(x, berlin).hour for x in t])
    rng = np.random.default_rng(5)
    y = 50 + rng.normal(0, 1, t.size) + np.where(local_hour == 9, 20.0, 0.0)
    switch = datetime(2024, 3, 31, 1, tzinfo=UTC).timestamp()
    after = []
    for tz in ("Europe/Berlin", "UTC"):
        _, events = run({"rules": [{"name": "shop", "step": "5m", "timezone": tz}]}, "orders", t, y)
        after.append([e.step_start for e in events if e.type == OPENED and e.step_start >= switch])
    assert after[0] == []
    assert len(after[1]) >= 1


def test_unknown_time_zone_is_a_config_error():
    import pytest

    from streamdet.config import ConfigError, parse_config

    with pytest.raises(ConfigError, match=r"rules\[0\]\.timezone: unknown time zone 'Mars/Olympus'"):
        parse_config({"rules": [{"name": "x", "timezone": "Mars/Olympus"}]})
