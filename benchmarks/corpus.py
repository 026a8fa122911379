"""Write the labelled evaluation corpus: two open datasets and generated shapes with known incidents.

Run: ``python benchmarks/corpus.py [--out benchmarks/corpus] [--seeds 3]``. Every file is a CSV
``time,value,<label>`` holding one series (the metric name is the file's stem), and
``labels.json`` maps each file's stem to its incident windows ``[[start, end], ...]`` (ISO 8601,
UTC); an empty list means "no incident: every opening is false". Reproducible: numpy
``default_rng`` with fixed seeds. See benchmarks/CORPUS.md for the same facts in a table.

Open data (shipped with installed libraries, read here and written out as CSV):

* ``waterflow.csv`` -- ``river.datasets.WaterFlow``: hourly flow through a water pipeline,
  2022-03-20 .. 2022-05-16. river's docstring says it holds three "low value moments" and a
  small peak. Windows: the hourly point index ranges (93, 112), (211, 226), (869, 886) (the low
  segments) and (326, 331) (the short peak), as read off the data for
  ``tests/test_detection.py::test_waterflow_low_segments_are_flagged``.
* ``nile.csv`` -- ``statsmodels.datasets.nile``: annual Nile volume at Aswan 1871-1970. The drop
  of the mean around 1898/1899 (Cobb 1978; the standard change-point example) is labelled
  1898-01-01 .. 1903-01-01, the years 1898-1902: the last pre-shift year through the first
  years after it (an annual step is decided at its end, so the opening about 1902's value
  comes in early 1903 at the latest); later openings are false.

Generated shapes, in a fictional scenario: "Larkspur Valley Cycles", an invented municipal
bike-share whose operations team watches 5-minute metrics. Every shape has ``--seeds`` series
(``<shape>_s<seed>.csv``), 5-minute steps from Monday 2019-03-04 00:00 UTC, four weeks
(five for the weekly cycle). The first 7 days are kept clean so the detector can learn them;
incidents are then placed at random times (at least a day apart) with random sizes measured
in the series' own noise. Incident kinds and their labelled windows:

* spike: one step far above normal; window = that step.
* dip: the level falls to 10-40 % for 1-3 hours; window = the dip.
* shift: a lasting level change; window = its first 3 hours only (after that it is the new
  normal and openings are false).
* drift (a slow leak): the level creeps away over 6-18 hours, then is repaired at once;
  window = start of the creep to the repair.
* burst: the noise grows 4-6x for 1-2 hours; window = the burst.
* surge: a count rate 4-8x normal for 1-2 hours; window = the surge.

Shapes:

* ``rentals``: bikes rented per step; negative binomial counts (heavy tailed), daily cycle.
  Incidents: spike, dip, spike, dip.
* ``dock_faults``: dock fault reports; mostly zero, occasional bursts of several (intermittent
  counts). Incidents: surges.
* ``app_logins``: app log-ins; noise 4x larger on weekdays 09-18 (busy hours). Incidents: dip,
  burst, spike.
* ``station_occupancy``: share of docks in use; weekday and weekend levels differ (weekly
  business cycle). Incidents: dip, spike, dip.
* ``api_requests``: requests to the rental API; growing trend times a daily cycle. Incidents:
  dip, burst, spike.
* ``battery_voltage``: e-bike charger voltage; one lasting level shift (and nothing else).
* ``brake_pressure``: hydraulic line pressure at the repair shop; a slow leak (drift) twice.
* ``kiosk_temperature``: flat noise, no incident (pure false-alarm measurement).
* ``repair_tickets``: Poisson low counts (mean 1-3 per step). Incidents: surges.
* ``hub_cpu``: CPU use of the fleet hub; autocorrelated noise (first-order autoregression,
  lag-one correlation 0.7-0.9, as utilisation and latency series usually have) around a daily
  cycle. Incidents: dip, spike, burst.
* ``kiosk_humidity``: autocorrelated noise (lag-one correlation 0.8-0.95), no incident (the
  false alarms a slow wobble raises).
"""

from __future__ import annotations

import argparse
import csv
import json
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

STEP = 300.0
DAY = 86400.0
START = datetime(2019, 3, 4, tzinfo=UTC).timestamp()  # a Monday
CLEAN_DAYS = 7
SITE = "larkspur"


def iso(t: float) -> str:
    return datetime.fromtimestamp(t, tz=UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def hours_of(t: np.ndarray) -> np.ndarray:
    return (t % DAY) / 3600.0


def weekday_of(t: np.ndarray) -> np.ndarray:
    return ((t - START) // DAY).astype(int) % 7  # START is a Monday: 0..4 weekdays


def daily(t: np.ndarray, peak_hour: float = 17.0) -> np.ndarray:
    """A smooth daily cycle in [0, 1], highest at ``peak_hour``."""
    return 0.5 + 0.5 * np.cos(2 * np.pi * (hours_of(t) - peak_hour) / 24.0)


class Incidents:
    """Random, non-overlapping incident start steps after the clean days, at least a day apart."""

    def __init__(self, rng: np.random.Generator, n_steps: int) -> None:
        self.rng = rng
        self.n = n_steps
        self.used: list[int] = []
        self.windows: list[tuple[float, float]] = []

    def start(self, length: int) -> int:
        lo, hi = int(CLEAN_DAYS * DAY / STEP), self.n - length - int(DAY / STEP / 2)
        for _ in range(1000):
            s = int(self.rng.integers(lo, hi))
            if all(abs(s - u) > DAY / STEP for u in self.used):
                self.used.append(s)
                return s
        raise RuntimeError("no room for another incident")

    def label(self, t: np.ndarray, first: int, last: int) -> None:
        """Label steps first..last (inclusive): from the first step's start to the last's end."""
        self.windows.append((float(t[first]), float(t[last] + STEP)))


def steps(rng: np.random.Generator, lo: float, hi: float) -> int:
    return int(np.rint(rng.uniform(lo, hi) * 3600 / STEP))


def add_spike(y, t, inc: Incidents, size: float) -> None:
    s = inc.start(1)
    y[s] += size
    inc.label(t, s, s)


def add_dip(y, t, inc: Incidents) -> None:
    n = steps(inc.rng, 1, 3)
    s = inc.start(n)
    y[s:s + n] *= inc.rng.uniform(0.1, 0.4)
    inc.label(t, s, s + n - 1)


def add_burst(y, t, inc: Incidents, sd: float) -> None:
    n = steps(inc.rng, 1, 2)
    s = inc.start(n)
    y[s:s + n] += inc.rng.normal(0, sd * inc.rng.uniform(4, 6), n)
    inc.label(t, s, s + n - 1)


def add_surge(rate: np.ndarray, t, inc: Incidents) -> None:
    n = steps(inc.rng, 1, 2)
    s = inc.start(n)
    rate[s:s + n] *= inc.rng.uniform(4, 8)
    inc.label(t, s, s + n - 1)


# ---------------------------------------------------------------- shapes
# Each takes (rng, t) and returns (values, labelled windows).


def rentals(rng, t):
    inc = Incidents(rng, t.shape[0])
    mean = (5 + 40 * daily(t)) * rng.uniform(0.8, 1.2)
    factor = np.ones_like(mean)
    for _ in range(2):
        add_dip(factor, t, inc)
    # Negative binomial counts, dispersion 3: variance = m + m^2 / 3 (heavy tailed).
    r, m = 3.0, mean * factor
    y = rng.negative_binomial(r, r / (r + m)).astype(float)
    for _ in range(2):
        s = inc.start(1)
        y[s] = mean[s] * rng.uniform(5, 8) + 40
        inc.label(t, s, s)
    return y, inc.windows


def dock_faults(rng, t):
    inc = Incidents(rng, t.shape[0])
    rate = np.full(t.shape[0], 0.04)
    for _ in range(3):
        add_surge(rate, t, inc)
    occurs = rng.random(t.shape[0]) < np.minimum(rate, 0.9)
    size = np.where(rate > 0.04, 1 + rng.poisson(3, t.shape[0]), rng.geometric(0.5, t.shape[0]))
    return (occurs * size).astype(float), inc.windows


def app_logins(rng, t):
    inc = Incidents(rng, t.shape[0])
    busy = (weekday_of(t) < 5) & (hours_of(t) >= 9) & (hours_of(t) < 18)
    sd = np.where(busy, 4 * 3.0, 3.0)
    y = 200 + 60 * daily(t, 13) + rng.normal(0, 1, t.shape[0]) * sd
    add_dip(y, t, inc)
    add_burst(y, t, inc, 3.0)
    add_spike(y, t, inc, rng.uniform(60, 90))
    return y, inc.windows


def station_occupancy(rng, t):
    inc = Incidents(rng, t.shape[0])
    weekday = weekday_of(t) < 5
    level = np.where(weekday, 0.35 + 0.4 * daily(t, 8.5), 0.55 + 0.1 * daily(t, 14))
    y = level + rng.normal(0, 0.02, t.shape[0])
    add_dip(y, t, inc)
    add_spike(y, t, inc, rng.uniform(0.2, 0.3))
    add_dip(y, t, inc)
    return np.clip(y, 0, 1), inc.windows


def api_requests(rng, t):
    inc = Incidents(rng, t.shape[0])
    days = (t - t[0]) / DAY
    level = (1000 + 15 * days) * (0.6 + 0.4 * daily(t, 12))
    sd = 25.0
    y = level + rng.normal(0, sd, t.shape[0])
    add_dip(y, t, inc)
    add_burst(y, t, inc, sd)
    add_spike(y, t, inc, sd * rng.uniform(8, 12))
    return y, inc.windows


def battery_voltage(rng, t):
    inc = Incidents(rng, t.shape[0])
    sd = 0.05
    y = 48 + rng.normal(0, sd, t.shape[0])
    s = inc.start(steps(rng, 3, 3))
    y[s:] += rng.choice([-1, 1]) * sd * rng.uniform(5, 8)
    inc.label(t, s, s + steps(rng, 3, 3) - 1)  # the shift's first 3 hours only
    return y, inc.windows


def brake_pressure(rng, t):
    inc = Incidents(rng, t.shape[0])
    sd = 0.4
    y = 80 + 2 * daily(t, 15) + rng.normal(0, sd, t.shape[0])
    for _ in range(2):
        n = steps(rng, 6, 18)
        s = inc.start(n)
        y[s:s + n] -= np.linspace(0, sd * rng.uniform(8, 12), n)  # the leak, then the repair
        inc.label(t, s, s + n - 1)
    return y, inc.windows


def kiosk_temperature(rng, t):
    return 21 + rng.normal(0, 0.3, t.shape[0]), []


def repair_tickets(rng, t):
    inc = Incidents(rng, t.shape[0])
    rate = rng.uniform(1, 3) * (0.5 + daily(t, 11))
    for _ in range(3):
        add_surge(rate, t, inc)
    return rng.poisson(rate).astype(float), inc.windows


def ar1(rng, n: int, rho: float, sd: float) -> np.ndarray:
    """First-order autoregressive noise with lag-one correlation ``rho`` and marginal ``sd``."""
    e = rng.normal(0, sd * np.sqrt(1 - rho * rho), n)
    out = np.empty(n)
    out[0] = rng.normal(0, sd)
    for i in range(1, n):
        out[i] = rho * out[i - 1] + e[i]
    return out


def hub_cpu(rng, t):
    inc = Incidents(rng, t.shape[0])
    sd = 3.0
    y = 40 + 15 * daily(t, 14) + ar1(rng, t.shape[0], rng.uniform(0.7, 0.9), sd)
    add_dip(y, t, inc)
    add_spike(y, t, inc, sd * rng.uniform(8, 12))
    add_burst(y, t, inc, sd)
    return y, inc.windows


def kiosk_humidity(rng, t):
    return 45 + ar1(rng, t.shape[0], rng.uniform(0.8, 0.95), 2.0), []


SHAPES: dict[str, tuple[Callable, int]] = {  # name -> (generator, days)
    "rentals": (rentals, 28),
    "dock_faults": (dock_faults, 28),
    "app_logins": (app_logins, 28),
    "station_occupancy": (station_occupancy, 35),
    "api_requests": (api_requests, 28),
    "battery_voltage": (battery_voltage, 28),
    "brake_pressure": (brake_pressure, 28),
    "kiosk_temperature": (kiosk_temperature, 28),
    "repair_tickets": (repair_tickets, 28),
    "hub_cpu": (hub_cpu, 28),
    "kiosk_humidity": (kiosk_humidity, 28),
}


def write_csv(path: Path, t: np.ndarray, y: np.ndarray, label: tuple[str, str] | None) -> None:
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["time", "value", *([label[0]] if label else [])])
        for ti, yi in zip(t.tolist(), y.tolist(), strict=True):
            w.writerow([iso(ti), f"{yi:.6g}", *([label[1]] if label else [])])


def open_data(out: Path) -> dict[str, list[list[str]]]:
    from river import datasets
    from statsmodels.datasets import nile

    labels: dict[str, list[list[str]]] = {}
    rows = list(datasets.WaterFlow())
    t = np.array([x["Time"].timestamp() for x, _ in rows])
    y = np.array([v for _, v in rows], dtype=float)
    write_csv(out / "waterflow.csv", t, y, None)
    segments = [(93, 112), (211, 226), (869, 886), (326, 331)]
    labels["waterflow"] = [[iso(t[lo]), iso(t[hi] + 3600)] for lo, hi in segments]  # to the hour's end
    d = nile.load_pandas().data
    years = d["year"].astype(int).tolist()
    tn = np.array([datetime(yr, 1, 1, tzinfo=UTC).timestamp() for yr in years])
    write_csv(out / "nile.csv", tn, d["volume"].to_numpy(dtype=float), None)
    labels["nile"] = [["1898-01-01T00:00:00Z", "1903-01-01T00:00:00Z"]]  # years 1898-1902
    return labels


def generate(out: Path, seeds: int = 3) -> dict[str, list[list[str]]]:
    """Write every file and labels.json into ``out``; returns the labels."""
    out.mkdir(parents=True, exist_ok=True)
    labels = open_data(out)
    for i, (name, (fn, days)) in enumerate(SHAPES.items()):
        t = START + np.arange(int(days * DAY / STEP)) * STEP
        for seed in range(1, seeds + 1):
            rng = np.random.default_rng(1000 * (i + 1) + seed)
            y, windows = fn(rng, t)
            stem = f"{name}_s{seed}"
            write_csv(out / f"{stem}.csv", t, y, ("site", SITE))
            labels[stem] = [[iso(s), iso(e)] for s, e in sorted(windows)]
    lines = [f"  {json.dumps(k)}: {json.dumps(v)}" for k, v in labels.items()]
    (out / "labels.json").write_text("{\n" + ",\n".join(lines) + "\n}\n")
    return labels


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(Path(__file__).parent / "corpus"))
    ap.add_argument("--seeds", type=int, default=3, help="series per generated shape")
    args = ap.parse_args()
    labels = generate(Path(args.out), args.seeds)
    n = sum(len(v) for v in labels.values())
    print(f"{len(labels)} files, {n} labelled windows in {args.out}")


if __name__ == "__main__":
    main()
