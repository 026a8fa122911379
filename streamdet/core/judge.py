"""The temporal judge: is this step unusual for the series itself?

For one wave of closed steps it runs the forecasters, the blend, the residual scale and the
calibrated tails, and returns an :class:`Assessment`: the expected value, the band (upper and
lower edges apart, clipped at zero for series never seen below zero) and each side's tail
probability of the observed value. ``learn`` then teaches every part from the same step.
Column-wise over all series of the wave; no I/O.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from streamdet.config import Config
from streamdet.core.band import Band
from streamdet.core.blend import Blend
from streamdet.core.columns import ColumnState, per_rule
from streamdet.core.forecast import (
    DampedHolt,
    HoltWinters,
    SeasonalNaive,
    StepContext,
    StreamingMedian,
)
from streamdet.core.tails import TailModel, side_probs, tail_quantile

SHAPE_CLIP = 5.0  # seasonal profiles learn from values clipped at this many band half-widths


@dataclass(slots=True)
class Assessment:
    """What the temporal judge found for each step of a wave (arrays shaped ``(rows,)``)."""

    preds: np.ndarray  # (members, rows)
    ready: np.ndarray  # (members, rows)
    weights: np.ndarray  # (members, rows)
    centre: np.ndarray
    any_ready: np.ndarray
    scale: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    z_edges: np.ndarray  # (rows, 2): band edges in scale units, above and below
    p_up: np.ndarray  # P(a value at least this high), from the upper tail
    p_lo: np.ndarray  # P(a value at least this low), from the lower tail
    score: np.ndarray  # (observed - expected) / scale
    season: np.ndarray  # the seasonal term of the Holt-Winters member (0 where it has none yet)


class TemporalJudge:
    """Forecasters, blend, residual scale and tails over column-wise state."""

    def __init__(self, config: Config, capacity: int) -> None:
        rules = config.rules
        f = [r.forecasters for r in rules]
        self.forecasters = [
            DampedHolt(capacity, alpha=[x.holt.alpha for x in f], beta=[x.holt.beta for x in f],
                       phi=[x.holt.phi for x in f]),
            HoltWinters(capacity, alpha=[x.seasonal.alpha for x in f],
                        beta=[x.seasonal.beta for x in f], phi=[x.seasonal.phi for x in f],
                        memory_weeks=[x.seasonal.memory_weeks for x in f]),
            SeasonalNaive(capacity, resolution=config.lag_resolution),
            StreamingMedian(capacity, rate=[x.quantile.rate for x in f]),
        ]
        self.members = tuple(m for fc in self.forecasters for m in fc.members)
        enabled = {"holt": [True] * len(rules),
                   "seasonal": [x.seasonal.enabled for x in f],
                   "lag_day": [x.lags.enabled for x in f],
                   "lag_week": [x.lags.enabled for x in f],
                   "median": [x.quantile.enabled for x in f]}
        self.member_enabled = np.array([enabled[m] for m in self.members], dtype=bool)
        self.blend = Blend(capacity, members=self.members,
                           learning_rate=[r.blend.learning_rate for r in rules],
                           share=[r.blend.share for r in rules])
        self.band = Band(capacity, scale_floor=[r.scale_floor for r in rules],
                         memory_weeks=[x.seasonal.memory_weeks for x in f])
        self.tails = TailModel(capacity)
        self.edge_rarity = np.array([r.edge_rarity for r in rules])
        self.min_width = np.array([r.min_width for r in rules])

    @property
    def parts(self) -> list[ColumnState]:
        return [*self.forecasters, self.blend, self.band, self.tails]

    def assess(self, ctx: StepContext, y: np.ndarray) -> Assessment:
        sel = ctx.r
        outs = [fc.predict(ctx) for fc in self.forecasters]
        season, found = self.forecasters[1].seasonal_term(ctx)
        preds = np.concatenate([o[0] for o in outs])
        ready = np.concatenate([o[1] for o in outs]) & self.member_enabled[:, ctx.rule]
        centre, weights, any_ready = self.blend.combine(sel, preds, ready)
        scale = self.band.scale_of(ctx)
        zeta, xi, sigma = self.tails.params(sel)
        q = per_rule(self.edge_rarity, ctx.rule)
        q = q[:, None] if isinstance(q, np.ndarray) else q
        z_edges = tail_quantile(zeta, xi, sigma, q)
        tiny = 1e-9 * np.abs(centre) + 1e-12
        min_width = per_rule(self.min_width, ctx.rule)
        up_half = np.maximum(np.maximum(z_edges[:, 0] * scale, min_width), tiny)
        lo_half = np.maximum(np.maximum(z_edges[:, 1] * scale, min_width), tiny)
        nonneg = self.band.low[sel] >= 0
        centre = np.where(nonneg, np.maximum(centre, 0.0), centre)
        lower = centre - lo_half
        floor_in_band = nonneg & (lower <= 0)
        lower = np.where(floor_in_band, 0.0, lower)
        eff = np.maximum(scale, tiny)
        score = (y - centre) / eff
        p_up, p_lo = side_probs(score, zeta, xi, sigma, z_edges)
        # Nothing below zero exists for such a series: a value at zero, when zero is inside its
        # band, is usual for it and carries no evidence (values above zero are judged as usual).
        p_lo = np.where(floor_in_band & (y <= 0.0), 1.0, p_lo)
        return Assessment(preds, ready, weights, centre, any_ready, scale, lower, centre + up_half,
                          z_edges, p_up, p_lo, score, np.where(found, season, 0.0))

    def learn(self, ctx: StepContext, y: np.ndarray, a: Assessment, judged: np.ndarray,
              in_breach: np.ndarray, in_run: np.ndarray) -> None:
        """Teach every part from the step: levels from the value clipped to the band (once the
        band is trusted), seasonal shapes from a looser clip, the blend from the raw value.
        Steps of an open breach do not teach the residual scale or the tails: an incident must
        not widen the band it is judged by. Steps of a run on one side of the band (``in_run``)
        teach the tails at most up to the band edge, while an isolated extreme value is tail
        behaviour and teaches up to a few times the edge's excess."""
        sel = ctx.r
        y_fit = np.where(judged, np.clip(y, a.lower, a.upper), y)
        lo_half = a.centre - a.lower
        up_half = a.upper - a.centre
        ctx.shape_y = np.where(judged, np.clip(y, a.centre - SHAPE_CLIP * lo_half,
                                               a.centre + SHAPE_CLIP * up_half), y)
        loss_scale = np.where(a.scale > 0, a.scale, np.maximum(np.abs(a.centre), 1.0))
        self.blend.update(sel, ctx.rule, a.preds, a.ready, y, loss_scale)
        for fc in self.forecasters:
            fc.update(ctx, y_fit)
        self.band.note_values(sel, y)
        has = a.any_ready & ~in_breach
        # the residual scale learns from steps outside runs only; the tails from both (capped)
        self.band.update(ctx, y - a.centre, has & ~in_run)
        self.tails.update(sel, a.score, a.z_edges, in_run, has & (a.scale > 0))

    def shift(self, rows: np.ndarray, delta: np.ndarray) -> None:
        for fc in self.forecasters:
            fc.shift(rows, delta)
