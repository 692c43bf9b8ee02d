"""Finite-size scaling of Γ(x, N): scaling forms, fits, resampled intervals, comparison.

numpy and scipy only; the Dask cluster and files are the business of
:mod:`sweepctl.analysis` and :mod:`sweepctl.report`.
"""

from sweepctl.fss.fit import (
    Fit,
    FitError,
    Intervals,
    ScalingData,
    branch_intervals,
    explore,
    fit,
    resampled_intervals,
)
from sweepctl.fss.model import Orders, ScalingModel

__all__ = [
    "Fit",
    "FitError",
    "Intervals",
    "Orders",
    "ScalingData",
    "ScalingModel",
    "branch_intervals",
    "explore",
    "fit",
    "resampled_intervals",
]
