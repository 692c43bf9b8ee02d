"""The physics criterion that may rule an acceptable fit out: leading-order dominance.

The scaling form ([M5] tests/REFERENCES.md) is an expansion of F(ψ_0, ψ_1) about the
fixed point in the irrelevant field ψ_1 = u_1 N^y; it describes data only where the
terms in ψ_1 are *corrections*, smaller than the leading behaviour F(ψ_0, 0) that they
correct (Slevin and Ohtsuki [1]_).  A flexible form can fit the same table with the roles
swapped: a small ν, whose ψ_0² grows far too fast with N, compensated by a cross term
ψ_0²ψ_1 of the opposite sign, so that the "correction" carries the x-dependence of Γ.
Such a minimum can have a good χ² but is not finite-size scaling about this fixed point.

Criterion ([M8] tests/REFERENCES.md, derived from [M5]): at the largest width N_max of
the fit's window, split the fitted Γ at each of that width's couplings into

* R = F(ψ_0, 0) − F(0, 0), the relevant field's x-dependence, and
* C = [F(ψ_0, ψ_1) − F(ψ_0, 0)] − [F(0, ψ_1^c) − F(0, 0)], the x-dependence the terms in
  ψ_1 add (ψ_1^c = u_1(x_c) N_max^y; the constant shift of Γ_c with N is not counted:
  a drifting crossing value is what corrections legitimately do);

the fit is ruled out when ‖C‖ > ‖R‖ (root-mean-square over those couplings), i.e. when
the correction is larger than what it corrects at the largest width, where it should be
smallest.  The threshold 1 is the weakest reading of "correction"; it is not tuned.  A
form without an irrelevant field has C = 0 and always passes.

References
----------
.. [1] K. Slevin and T. Ohtsuki, "Corrections to scaling at the Anderson transition",
   Phys. Rev. Lett. 82, 382 (1999) ([M5] tests/REFERENCES.md).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sweepctl.fss.fit import Fit

#: a fit whose correction share exceeds this is ruled out (module docstring)
MAX_CORRECTION_SHARE = 1.0
#: one line for outputs: what the criterion is and where it is documented
CRITERION_TEXT = (
    "leading-order dominance: a fit is ruled out when the irrelevant-field terms carry "
    "more of Γ's x-dependence at the largest width than the relevant field does "
    "(corrections to scaling must be smaller than what they correct; Slevin & Ohtsuki, "
    "PRL 82, 382 (1999); [M8] tests/REFERENCES.md)"
)


@dataclass(frozen=True)
class Verdict:
    """Outcome of the criterion for one fit."""

    ok: bool
    #: ‖C‖/‖R‖ at the largest width (0 without an irrelevant field)
    share: float
    #: the largest width of the fit's window
    width: int


def correction_share(fit: Fit) -> tuple[float, int]:
    """‖C‖/‖R‖ at the largest width of ``fit``'s window (module docstring).

    Parameters
    ----------
    fit : Fit
        A converged fit carrying its data window.

    Returns
    -------
    share, width : float, int
        The ratio (``inf`` when the relevant field alone gives no x-dependence there) and
        the width it was evaluated at.
    """
    m, d = fit.model, fit.data
    if d is None:
        raise ValueError("the fit carries no data window")
    n_all = np.asarray(d.N, float)
    top = float(n_all.max())
    if not m.has_irrelevant:
        return 0.0, int(top)
    sel = n_all == top
    x = np.asarray(d.x, float)[sel]
    n = n_all[sel]
    psi0, _ = m.fields(fit.theta, x, n)
    full = m.design(fit.theta, x, n) @ fit.f
    relevant = m.relevant_curve(fit.f, psi0)
    # at the crossing ψ_0 = 0 and ψ_1 = u_1(x_c) N^y
    xc = np.array([fit.values()["x_c"]])
    nc = np.array([top])
    psi0_c, _ = m.fields(fit.theta, xc, nc)
    shift_c = float((m.design(fit.theta, xc, nc) @ fit.f)[0] - m.relevant_curve(fit.f, psi0_c)[0])
    r = relevant - fit.f[0]
    c = (full - relevant) - shift_c
    rn = float(np.sqrt(np.mean(r**2)))
    cn = float(np.sqrt(np.mean(c**2)))
    if rn == 0.0:
        return (math.inf if cn > 0.0 else 0.0), int(top)
    return cn / rn, int(top)


def leading_order(fit: Fit) -> Verdict:
    """Whether ``fit`` passes leading-order dominance (module docstring)."""
    share, width = correction_share(fit)
    return Verdict(share <= MAX_CORRECTION_SHARE, share, width)


__all__ = ["CRITERION_TEXT", "MAX_CORRECTION_SHARE", "Verdict", "correction_share", "leading_order"]
