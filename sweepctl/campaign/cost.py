"""What a point costs: calibrated cost parts and the re-orthogonalisation schedule.

Seconds per strip-layer of a point = ``c(N) + q(point)·t_QR(N)``: ``c`` the node
columns, phases and draws of one layer (calibrated on the clean network and with node
disorder), ``t_QR`` one QR of one strip's ``2N × N`` frame, both measured by
``sweepctl bench``; ``q`` the mean QRs per layer that the engine's schedule does for
this point's disorder, ε, coupling and strip count
(:func:`sweepctl.kernel.schedule.expected_qr_per_layer`). With blocking nodes ``q``
goes from 1/8 to ≈ 2, which is why a node-disorder campaign costs up to ten clean ones.
"""

from __future__ import annotations

import math

import numpy as np

from sweepctl.campaign.recipe import Point

__all__ = ["CostModel"]


class _PowerLaw:
    """Log-log interpolation in width; beyond the calibrated widths the nearest
    segment's power law is extended, with at least the growth ``min_slope`` the
    operation count implies."""

    def __init__(self, widths: np.ndarray, values: np.ndarray, min_slope: float) -> None:
        self.lw, self.lv, self.min_slope = np.log(widths), np.log(values), min_slope

    def __call__(self, width: int) -> float:
        lw, lv = self.lw, self.lv
        x = math.log(width)
        if lw.size == 1:
            return float(math.exp(lv[0] + self.min_slope * (x - lw[0])))
        if x <= lw[0]:
            slope = max((lv[1] - lv[0]) / (lw[1] - lw[0]), 0.0)
            return float(math.exp(lv[0] + slope * (x - lw[0])))
        if x >= lw[-1]:
            slope = max((lv[-1] - lv[-2]) / (lw[-1] - lw[-2]), self.min_slope)
            return float(math.exp(lv[-1] + slope * (x - lw[-1])))
        return float(math.exp(np.interp(x, lw, lv)))


class CostModel:
    """Seconds per strip-layer of any point, from a ``sweepctl bench`` calibration."""

    def __init__(self, rows: list[dict]) -> None:
        need = ("column_seconds", "column_seconds_disorder", "qr_seconds")
        by_width: dict[int, dict] = {}
        for r in rows:
            if any(not math.isfinite(float(r.get(k, math.nan))) for k in need):
                raise ValueError("calibration lacks the cost parts (made by an older sweepctl)")
            by_width[int(r["width"])] = r
        if not by_width:
            raise ValueError("empty calibration")
        w = np.array(sorted(by_width), dtype=float)

        def col(k: str) -> np.ndarray:
            return np.array([float(by_width[int(n)][k]) for n in w])

        # node update ∝ N² per strip-layer (2N links × N frame columns); QR ∝ N³
        self._column = _PowerLaw(w, col("column_seconds"), 2.0)
        self._column_disorder = _PowerLaw(w, col("column_seconds_disorder"), 2.0)
        self._qr = _PowerLaw(w, col("qr_seconds"), 3.0)
        self.widths = w
        self._memo: dict[tuple[Point, int], float] = {}

    def qr_per_layer(self, point: Point, strips: int) -> float:
        """Mean QRs per layer of the engine's schedule at ``point``."""
        from sweepctl.kernel.network import NetworkModel
        from sweepctl.kernel.schedule import expected_qr_per_layer

        model = NetworkModel(point.width, point.x, point.p_block, point.p_open, point.epsilon)
        return expected_qr_per_layer(model, strips)

    def point_seconds(self, point: Point, strips: int) -> float:
        """Seconds per strip-layer at ``point`` (one BLAS thread); memoised, since the
        driver prices every open point on each progress update."""
        key = (point, strips)
        if key not in self._memo:
            self._memo[key] = self._price(point, strips)
        return self._memo[key]

    def _price(self, point: Point, strips: int) -> float:
        n = point.width
        disordered = point.p_block > 0 or point.p_open > 0
        c = self._column_disorder(n) if disordered else self._column(n)
        return c + self.qr_per_layer(point, strips) * self._qr(n)

    def seconds_per_strip_layer(self, width: int) -> float:
        """Seconds per strip-layer of the clean network at x = 0 (8 strips)."""
        return self.point_seconds(Point(0.0, 0.0, 1e-6, width, 0.0), 8)

    def replica_seconds(self, point: Point, layers: int, warmup: int, strips: int) -> float:
        """CPU seconds of one replica at ``point``."""
        return self.point_seconds(point, strips) * strips * (layers + warmup)
