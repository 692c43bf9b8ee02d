"""The rehearsal model: a known finite-size-scaling law in place of the network kernel.

A campaign on this model runs exactly like one on the network (same points, seeds,
rounds, store rows and cost accounting) but a replica takes microseconds: its strip
values are drawn around a scaling law chosen in the recipe. It serves to rehearse a
campaign plan or a cluster configuration without spending the CPU, and to test what
depends on Γ(N, x) (stop rules, merges, fits, allocation) against a known truth.

The law
-------
.. math::

    Γ(N, x) = Γ_c + \\sum_{k=1}^{K} F_k\\, ρ^k + b\\, N^{y},
    \\qquad ρ = (x - x_c)\\, N^{1/ν},

with ``Gamma_c`` = Γ_c, ``F`` = (F_1, …, F_K), ``correction`` = b and ``y < 0`` in the
recipe's ``[model]`` table. It is the Slevin–Ohtsuki form ([M5] tests/REFERENCES.md)
with a relevant field u_0 = x − x_c, an irrelevant field u_1 = 1 and no mixed terms,
so a fit with that form can recover ν, y, x_c and Γ_c. The same law holds on every
disorder and ε slice (only the cost differs there).

The noise
---------
One strip of L measured layers gives Γ(N, x) + σ z with z a standard normal and

.. math::

    σ^2 = \\text{noise}^2 \\cdot k\\, N\\, Γ(N, x) / L,\\qquad k = 1.00,

the law the network kernel's strips follow: ``k = s²L/(NΓ)`` measured on the clean
network is constant within its error bars at N = 4, 8, 16, x = 0 to 0.5 and L = 500 to
4000 (where ``s²L/(NΓ²)`` falls from 1.2 to 0.4 as Γ grows), see [R1]
tests/REFERENCES.md. Strip values of the
network are means over many layers, hence Gaussian for L ≫ N; the model is meant for
that regime (σ ≪ Γ). Warm-up layers are priced but do not change the values.

Seeds. ``strip_gammas`` takes the replica's ``SeedSequence`` (the same one a network
replica of that point and index gets) and draws ``strips`` normals from a PCG64
generator: a replica is a pure function of (seed, point, L, strips, law), bit for bit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["NOISE_CONSTANT", "RehearsalModel"]

#: ``k`` in Var Γ_strip = k·N·Γ/L, measured on the network kernel ([R1]
#: tests/REFERENCES.md): 1.00 ± 0.014 (clean network, N = 4, 8, 16, x = 0 to 0.5).
NOISE_CONSTANT = 1.00


@dataclass(frozen=True)
class RehearsalModel:
    """A scaling law with network-like strip noise (see the module docstring).

    Parameters
    ----------
    nu
        Localisation-length exponent ν (> 0).
    Gamma_c
        Γ at the critical point as N → ∞ (> 0).
    F
        Coefficients F_1 … F_K of ρ, ρ², … in the scaling function.
    x_c
        Critical coupling.
    y
        Leading irrelevant exponent (< 0); needed when ``correction`` ≠ 0.
    correction
        Amplitude b of the correction b·N^y.
    noise
        Factor on the network's strip-to-strip standard deviation (1 = as the network).
    """

    nu: float
    Gamma_c: float
    F: tuple[float, ...]
    x_c: float = 0.0
    y: float | None = None
    correction: float = 0.0
    noise: float = 1.0

    def Gamma(self, width: int, x: float) -> float:
        """The law's Γ(N, x) (the mean every strip value scatters around)."""
        rho = (float(x) - self.x_c) * float(width) ** (1.0 / self.nu)
        g = self.Gamma_c
        for k, f in enumerate(self.F, start=1):
            g += f * rho**k
        if self.correction:
            g += self.correction * float(width) ** float(self.y)
        return float(g)

    def strip_sigma(self, width: int, x: float, layers: int) -> float:
        """Standard deviation of one strip's Γ over ``layers`` measured layers."""
        g = self.Gamma(width, x)
        return self.noise * math.sqrt(NOISE_CONSTANT * width * max(g, 0.0) / layers)

    def strip_gammas(
        self, width: int, x: float, layers: int, strips: int, seed: np.random.SeedSequence
    ) -> np.ndarray:
        """Γ of ``strips`` independent strips of ``layers`` measured layers."""
        rng = np.random.Generator(np.random.PCG64(seed))
        z = rng.standard_normal(int(strips))
        return self.Gamma(width, x) + self.strip_sigma(width, x, layers) * z

    def to_dict(self) -> dict:
        """Canonical form (recipe history, frozen settings, replica rows)."""
        return {
            "kind": "rehearsal",
            "nu": self.nu,
            "Gamma_c": self.Gamma_c,
            "F": list(self.F),
            "x_c": self.x_c,
            "y": self.y,
            "correction": self.correction,
            "noise": self.noise,
        }

    @classmethod
    def from_dict(cls, d: dict) -> RehearsalModel:
        """Inverse of :meth:`to_dict`."""
        return cls(
            nu=float(d["nu"]),
            Gamma_c=float(d["Gamma_c"]),
            F=tuple(float(f) for f in d["F"]),
            x_c=float(d.get("x_c", 0.0)),
            y=None if d.get("y") is None else float(d["y"]),
            correction=float(d.get("correction", 0.0)),
            noise=float(d.get("noise", 1.0)),
        )
