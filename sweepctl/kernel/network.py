"""The network model: node parameters, random draws and a dense reference layer.

Conventions (see DEVELOPERS.md, "Physics conventions"):

* A strip has ``N`` nodes per column and ``2N`` links, periodic in the transverse
  direction. One *layer* is an A column of nodes on link pairs ``(2j, 2j+1)``
  followed by i.i.d. uniform link phases, then a B column on pairs
  ``(2j+1, 2j+2 mod 2N)`` followed by i.i.d. uniform link phases.
* A node's transfer block is ``[[cosh θ, sinh θ], [sinh θ, cosh θ]]``. With
  coupling ``x`` the transmission is ``t = (1 + e^{2x})^{-1/2}`` on A, so that
  ``sinh θ_A = e^{x}`` and ``sinh θ_B = e^{-x}``; the critical point of the clean
  network is ``x = 0`` [1]_.
* Node disorder: on A a node is *blocking* (transmission ``ε``, regularised) with
  probability ``p_block`` and *open* (``θ = 0``) with probability ``p_open``; on B
  the roles swap, so ``p_block = p_open`` is self-dual with ``x_c = 0`` [2]_.

References
----------
.. [1] J. T. Chalker and P. D. Coddington, J. Phys. C 21, 2665 (1988) ([P8]
   tests/REFERENCES.md).
.. [2] I. Gruzberg, A. Klümper, W. Nuding, A. Sedrakyan, Phys. Rev. B 95, 125414
   (2017) ([P6] tests/REFERENCES.md).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = [
    "BLOCKING",
    "NORMAL",
    "OPEN",
    "LayerDraws",
    "NetworkModel",
    "default_warmup",
    "dense_column",
    "dense_layer",
    "draw_layers",
]


def default_warmup(width: int) -> int:
    """Layers discarded before accumulating: ``max(5N, 32)``, a few localisation lengths."""
    return max(5 * width, 32)


#: Node kinds as stored in ``LayerDraws.kinds``.
NORMAL, BLOCKING, OPEN = 0, 1, 2


@dataclass(frozen=True)
class NetworkModel:
    """Parameters of one network strip (one *point* of a campaign).

    Parameters
    ----------
    width
        ``N``, nodes per column (the strip has ``2N`` links), ``N >= 1``.
    x
        Coupling; ``t_A = (1 + e^{2x})^{-1/2}``.
    p_block, p_open
        Probabilities of a blocking and of an open node on the A sublattice
        (swapped on B). Each in ``[0, 1]``, sum at most 1.
    epsilon
        Transmission of a blocking node, in ``(0, 0.1]``.
    phase_disorder
        ``True`` (the physical model): i.i.d. uniform link phases. ``False``
        sets every phase to 1, the clean periodic network used as an exact check.
    """

    width: int
    x: float
    p_block: float = 0.0
    p_open: float = 0.0
    epsilon: float = 1e-6
    phase_disorder: bool = True

    def __post_init__(self) -> None:
        if isinstance(self.width, bool) or not isinstance(self.width, (int, np.integer)):
            raise ValueError(f"width must be an integer >= 1, got {self.width!r}")
        if self.width < 1:
            raise ValueError(f"width must be >= 1, got {self.width}")
        if not math.isfinite(self.x):
            raise ValueError(f"x must be finite, got {self.x!r}")
        for name in ("p_block", "p_open"):
            v = getattr(self, name)
            if not (0.0 <= v <= 1.0):
                raise ValueError(f"{name} must lie in [0, 1], got {v}")
        if self.p_block + self.p_open > 1.0 + 1e-12:
            raise ValueError(
                f"p_block + p_open must be at most 1, got {self.p_block} + {self.p_open}"
            )
        if not (0.0 < self.epsilon <= 0.1):
            raise ValueError(f"epsilon must lie in (0, 0.1], got {self.epsilon}")

    @property
    def links(self) -> int:
        """Number of links, ``2N``."""
        return 2 * self.width

    @property
    def has_node_disorder(self) -> bool:
        """Whether node kinds are drawn at random (``p_block + p_open > 0``)."""
        return self.p_block > 0.0 or self.p_open > 0.0

    @property
    def draws_per_layer(self) -> int:
        """Uniform variates consumed per layer and strip: ``4N`` phases, ``2N`` nodes."""
        return (4 * self.width if self.phase_disorder else 0) + (
            2 * self.width if self.has_node_disorder else 0
        )

    def node_table(self) -> np.ndarray:
        """Node transfer-block coefficients ``[sublattice, kind, (cosh θ, sinh θ)]``, ``(2, 3, 2)``.

        Sublattice 0 is A, 1 is B; kinds are :data:`NORMAL`, :data:`BLOCKING`,
        :data:`OPEN`. ``cosh θ = 1/t`` and ``sinh θ = r/t`` with ``r² + t² = 1``.
        """
        eps = self.epsilon
        tab = np.zeros((2, 3, 2))
        for half, sign in ((0, 1.0), (1, -1.0)):
            s = math.exp(sign * self.x)
            tab[half, NORMAL] = (math.sqrt(1.0 + s * s), s)
            tab[half, BLOCKING] = (1.0 / eps, math.sqrt((1.0 - eps) * (1.0 + eps)) / eps)
            tab[half, OPEN] = (1.0, 0.0)
        return tab

    def growth_table(self) -> np.ndarray:
        """``2θ`` per ``[sublattice, kind]``: the log of each node block's condition number.

        A node block has singular values ``e^{±θ}``; a column of nodes on disjoint
        pairs has condition number ``e^{2 max θ}``, which bounds how much one column
        can spread the frame.
        """
        tab = self.node_table()
        return 2.0 * np.arcsinh(tab[..., 1])

    def neg_log_t_table(self) -> np.ndarray:
        """``-ln t`` per ``[sublattice, kind]`` (the sum-rule weights)."""
        out = np.empty((2, 3))
        out[0, NORMAL] = 0.5 * np.logaddexp(0.0, 2.0 * self.x)
        out[1, NORMAL] = 0.5 * np.logaddexp(0.0, -2.0 * self.x)
        out[:, BLOCKING] = -math.log(self.epsilon)
        out[:, OPEN] = 0.0
        return out

    def clean_sum_rule(self) -> float:
        """Expected sum of the ``N`` positive exponents per layer.

        Jensen's formula applied to ``<ln|det t|>`` with uniform phases gives
        ``Σ_i γ_i = Σ_nodes -ln t`` averaged over node kinds (derived: [K3] in
        tests/REFERENCES.md).
        """
        w = self.neg_log_t_table()
        pa = (1.0 - self.p_block - self.p_open, self.p_block, self.p_open)
        pb = (1.0 - self.p_block - self.p_open, self.p_open, self.p_block)
        per_a = sum(p * w[0, k] for k, p in enumerate(pa))
        per_b = sum(p * w[1, k] for k, p in enumerate(pb))
        return self.width * (per_a + per_b)


@dataclass(frozen=True)
class LayerDraws:
    """Random content of ``K`` consecutive layers for ``S`` strips.

    Attributes
    ----------
    uniforms
        The raw variates, shape ``(K, S, draws_per_layer)``, in the order they were
        taken from the bit generator: per layer and strip, ``2N`` A-column phases,
        ``2N`` B-column phases, then ``N`` A-node and ``N`` B-node variates.
    kinds
        Node kinds, int8, shape ``(K, S, 2N)``: A nodes then B nodes.
    """

    uniforms: np.ndarray
    kinds: np.ndarray


def draw_layers(
    model: NetworkModel,
    rng: np.random.Generator,
    layers: int,
    strips: int,
    out: tuple[np.ndarray, np.ndarray] | None = None,
) -> LayerDraws:
    """Draw the random content of ``layers`` layers for ``strips`` strips.

    One call for ``K1 + K2`` layers consumes the bit stream exactly as two calls for
    ``K1`` and ``K2`` layers (``Generator.random`` fills in C order, one 64-bit word
    per variate), which is what makes results independent of chunking. ``out`` may
    give reusable buffers ``(uniforms, kinds)`` of at least ``layers`` rows.
    """
    from sweepctl.kernel._loops import classify_nodes

    n = model.width
    if out is None:
        u = np.empty((layers, strips, model.draws_per_layer))
        kinds = np.empty((layers, strips, 2 * n), dtype=np.int8)
    else:
        u, kinds = out[0][:layers], out[1][:layers]
    rng.random(out=u)
    if model.has_node_disorder:
        off = 4 * n if model.phase_disorder else 0
        classify_nodes(u, off, n, model.p_block, model.p_open, kinds)
    else:
        kinds[...] = NORMAL
    return LayerDraws(uniforms=u, kinds=kinds)


def dense_column(
    model: NetworkModel, draws: LayerDraws, layer: int, strip: int, half: int
) -> np.ndarray:
    """One column of nodes and its link phases as a dense ``2N × 2N`` matrix.

    An independent, slow construction used to check the fast kernel: ``P · C`` with
    ``C`` the block matrix of node blocks of sublattice ``half`` (0 = A, 1 = B) and
    ``P`` the diagonal matrix of the phases that follow it.
    """
    n, nl = model.width, model.links
    tab = model.node_table()
    k = draws.kinds[layer, strip]
    col = np.zeros((nl, nl))
    for j in range(n):
        c, s = tab[half, k[half * n + j]]
        ia, ib = (2 * j + half) % nl, (2 * j + half + 1) % nl
        col[ia, ia] += c
        col[ib, ib] += c
        col[ia, ib] += s
        col[ib, ia] += s
    if model.phase_disorder:
        u = draws.uniforms[layer, strip, half * nl : (half + 1) * nl]
        return np.exp(2j * np.pi * u)[:, None] * col
    return col.astype(complex)


def dense_layer(model: NetworkModel, draws: LayerDraws, layer: int, strip: int) -> np.ndarray:
    """The full ``2N × 2N`` transfer matrix ``P_B · B · P_A · A`` of one layer, built densely."""
    return dense_column(model, draws, layer, strip, 1) @ dense_column(model, draws, layer, strip, 0)
