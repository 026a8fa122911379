"""Forecasters over column-wise state, one array row per series.

Each forecaster offers ``predict(ctx) -> (values, ready)`` with arrays shaped
``(members, rows)``, ``update(ctx, y)`` and ``shift(rows, delta)``; the blend
weighs their members per series.
"""

from streamdet.core.forecast.base import Forecaster, Profile, StepContext
from streamdet.core.forecast.holt import DampedHolt
from streamdet.core.forecast.lags import SeasonalNaive
from streamdet.core.forecast.quantile import StreamingMedian
from streamdet.core.forecast.seasonal import HoltWinters

__all__ = ["DampedHolt", "Forecaster", "HoltWinters", "Profile", "SeasonalNaive", "StepContext",
           "StreamingMedian"]
