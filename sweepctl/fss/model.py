"""Scaling forms for the finite-size-scaling fit of Γ(x, N).

The form is that of Slevin and Ohtsuki [1]_ ([M5] tests/REFERENCES.md):

.. math::

    Γ = F(ψ_0, ψ_1),\\quad ψ_0 = u_0(w) N^{1/ν},\\quad ψ_1 = u_1(w) N^{y},\\quad w = x - x_c,

with ``F`` a double polynomial :math:`\\sum_{i \\le n_R,\\, j \\le n_I} f_{ij} ψ_0^i ψ_1^j`,
the relevant field :math:`u_0 = w + \\sum_{k=2}^{m_R} a_k w^k` and the irrelevant field
:math:`u_1 = 1 + \\sum_{k=1}^{m_I} b_k w^k` (the leading coefficients are fixed to one;
the overall scales live in ``f``).  ``y < 0`` is the leading irrelevant exponent.

*Symmetric* forms encode the duality x → −x of networks with p_block = p_open
([K7] tests/REFERENCES.md, derived): x_c = 0, u_0 odd and u_1 even in x, hence F even in
ψ_0.

The *logarithmic* variant replaces ``N^y`` by ``1/ln N`` (no ``y``), a marginal correction
offered for comparison against the power law.

``F`` is linear in ``f``; the fit profiles it out by weighted linear least squares for each
trial of the nonlinear parameters (variable projection, Golub and Pereyra [2]_; [M7]
tests/REFERENCES.md).

References
----------
.. [1] K. Slevin and T. Ohtsuki, "Corrections to scaling at the Anderson transition",
   Phys. Rev. Lett. 82, 382 (1999) ([M5] tests/REFERENCES.md).
.. [2] G. H. Golub and V. Pereyra, "The differentiation of pseudo-inverses and nonlinear
   least squares problems whose variables separate", SIAM J. Numer. Anal. 10, 413 (1973)
   ([M7] tests/REFERENCES.md).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

CORRECTIONS = ("power", "log")


@dataclass(frozen=True)
class Orders:
    """Expansion orders: F in ψ_0 (n_R) and ψ_1 (n_I), u_0 in w (m_R), u_1 in w (m_I)."""

    n_R: int = 2
    n_I: int = 1
    m_R: int = 1
    m_I: int = 0

    def __post_init__(self) -> None:
        if self.n_R < 1 or self.n_I < 0 or self.m_R < 1 or self.m_I < 0:
            raise ValueError(f"orders {self.label()}: need n_R >= 1, n_I >= 0, m_R >= 1, m_I >= 0")

    def label(self) -> str:
        return f"{self.n_R},{self.n_I},{self.m_R},{self.m_I}"

    @classmethod
    def parse(cls, text: str) -> Orders:
        """``"nR,nI,mR,mI"`` → :class:`Orders` (ValueError with the reason)."""
        parts = [p.strip() for p in str(text).split(",")]
        if len(parts) != 4 or not all(p.lstrip("-").isdigit() for p in parts):
            raise ValueError(f"{text!r} is not four integers n_R,n_I,m_R,m_I (e.g. 2,1,1,0)")
        return cls(*(int(p) for p in parts))


@dataclass(frozen=True)
class ScalingModel:
    """One scaling form: orders, symmetry and the kind of irrelevant correction."""

    orders: Orders = Orders()
    symmetric: bool = False
    correction: str = "power"
    #: the irrelevant exponent held at this value instead of fitted (correction
    #: sensitivity, :mod:`sweepctl.fss.procedure`); ``None``: y is a fit parameter
    fixed_y: float | None = None

    def __post_init__(self) -> None:
        if self.correction not in CORRECTIONS:
            raise ValueError(f"correction {self.correction!r}: use one of {CORRECTIONS}")
        if self.fixed_y is not None and not (self.has_irrelevant and self.correction == "power"):
            raise ValueError("a fixed y needs an irrelevant field (n_I > 0) with power correction")
        if self.fixed_y is not None and not self.fixed_y < 0:
            raise ValueError(f"fixed y = {self.fixed_y:g}: an irrelevant exponent must be < 0")

    # -- parameter layout -----------------------------------------------------------
    @property
    def has_irrelevant(self) -> bool:
        return self.orders.n_I > 0

    @property
    def has_y(self) -> bool:
        """Whether y is a fit parameter (a power-law correction with y not held fixed)."""
        return self.has_irrelevant and self.correction == "power" and self.fixed_y is None

    def f_powers(self) -> list[tuple[int, int]]:
        """(i, j) of the linear coefficients f_ij, in column order."""
        i_s = range(0, self.orders.n_R + 1, 2 if self.symmetric else 1)
        return [(i, j) for j in range(self.orders.n_I + 1) for i in i_s]

    def a_powers(self) -> list[int]:
        """Powers k ≥ 2 of w in u_0 (odd only when symmetric)."""
        return [k for k in range(2, self.orders.m_R + 1) if not (self.symmetric and k % 2 == 0)]

    def b_powers(self) -> list[int]:
        """Powers k ≥ 1 of w in u_1 (even only when symmetric); none without ψ_1."""
        if not self.has_irrelevant:
            return []
        return [k for k in range(1, self.orders.m_I + 1) if not (self.symmetric and k % 2)]

    def nonlinear_names(self) -> list[str]:
        names = ["nu"]
        if self.has_y:
            names.append("y")
        if not self.symmetric:
            names.append("x_c")
        names += [f"a{k}" for k in self.a_powers()]
        names += [f"b{k}" for k in self.b_powers()]
        return names

    @property
    def n_params(self) -> int:
        return len(self.nonlinear_names()) + len(self.f_powers())

    def describe(self) -> str:
        kind = "symmetric" if self.symmetric else "general"
        corr = "" if not self.has_irrelevant else f", {self.correction} correction"
        if self.fixed_y is not None:
            corr += f", y fixed at {self.fixed_y:g}"
        return f"orders {self.orders.label()} ({kind}{corr})"

    # -- evaluation -----------------------------------------------------------------
    def unpack(self, theta: np.ndarray) -> dict[str, float]:
        return dict(zip(self.nonlinear_names(), map(float, theta), strict=True))

    def fields(
        self, theta: np.ndarray, x: np.ndarray, n: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Scaling variables ψ_0 and ψ_1 at the points (ψ_1 = 0 without a correction)."""
        p = self.unpack(theta)
        w = x - p.get("x_c", 0.0)
        log_n = np.log(n)
        # powers of w by repeated products: this runs in every residual evaluation
        top = max([1, *self.a_powers(), *self.b_powers()])
        wk = [np.ones_like(w), w]
        for _ in range(2, top + 1):
            wk.append(wk[-1] * w)
        u0 = w.copy()
        for k in self.a_powers():
            u0 += p[f"a{k}"] * wk[k]
        psi0 = u0 * np.exp(log_n / p["nu"])
        if not self.has_irrelevant:
            return psi0, np.zeros_like(psi0)
        u1 = np.ones_like(w)
        for k in self.b_powers():
            u1 += p[f"b{k}"] * wk[k]
        if self.correction == "log":
            scale = 1.0 / log_n
        else:
            scale = np.exp(log_n * (p["y"] if self.fixed_y is None else self.fixed_y))
        return psi0, u1 * scale

    def design(self, theta: np.ndarray, x: np.ndarray, n: np.ndarray) -> np.ndarray:
        """Columns ψ_0^i ψ_1^j for the f_ij of :meth:`f_powers`."""
        psi0, psi1 = self.fields(theta, x, n)
        p0 = [np.ones_like(psi0)]
        for _ in range(self.orders.n_R):
            p0.append(p0[-1] * psi0)
        p1 = [np.ones_like(psi1)]
        for _ in range(self.orders.n_I):
            p1.append(p1[-1] * psi1)
        powers = self.f_powers()
        out = np.empty((psi0.size, len(powers)))
        for c, (i, j) in enumerate(powers):
            np.multiply(p0[i], p1[j], out=out[:, c])
        return out

    def evaluate(
        self, theta: np.ndarray, f: np.ndarray, x: np.ndarray, n: np.ndarray
    ) -> np.ndarray:
        """Γ of the scaling form at (x, N)."""
        return self.design(theta, np.asarray(x, float), np.asarray(n, float)) @ f

    def relevant_curve(self, f: np.ndarray, psi0: np.ndarray) -> np.ndarray:
        """F(ψ_0, 0): the scaling function with the irrelevant field switched off."""
        psi0 = np.asarray(psi0, float)
        terms = [f[c] * psi0**i for c, (i, j) in enumerate(self.f_powers()) if j == 0]
        return np.sum(terms, axis=0)

    def relevant_part(
        self, theta: np.ndarray, f: np.ndarray, x: np.ndarray, n: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """(ψ_0, F(ψ_0, 0)) at the points — the collapse with the irrelevant field removed."""
        psi0, _ = self.fields(theta, np.asarray(x, float), np.asarray(n, float))
        return psi0, self.relevant_curve(f, psi0)
