"""Points tables for the fit: from a store (merged on the fly) or a CSV/Parquet file.

Columns: ``N``, ``x``, ``Gamma``, ``Gamma_err`` (required), ``p_block``, ``p_open``,
``epsilon`` (slices), and ``n_strips`` (optional): the number of independent strip
estimates behind each ``Gamma_err``.  Without ``n_strips`` the errors are treated as exact
and the fit says so (``Fit.gof_method``); with it, the goodness of fit and the resampled
intervals account for the errors being estimates (:mod:`sweepctl.fss.fit`).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from sweepctl.fss.fit import FitError, ScalingData

REQUIRED = ("N", "x", "Gamma", "Gamma_err")
SLICE_COLUMNS = ("p_block", "p_open", "epsilon")
#: optional: independent strip estimates behind Gamma_err (absent: errors taken as exact)
STRIPS_COLUMN = "n_strips"


def read_points(source: str | Path) -> pd.DataFrame:
    """The per-point table of a store directory, or a CSV / Parquet points file."""
    src = Path(source)
    if src.is_dir():
        from sweepctl.campaign.store import Store
        from sweepctl.campaign.summary import merge_table

        store = Store(src)
        if not store.campaign_file.exists():
            raise FitError(
                f"{src}: a directory without campaign.json is not a store; give a store "
                "or a points table (CSV or Parquet)"
            )
        df = merge_table(store)
        if df.empty:
            raise FitError(f"{src}: the store has no replica rows yet; run the campaign first")
        return df
    if not src.exists():
        raise FitError(f"{src}: no such file or store directory")
    readers = {".csv": pd.read_csv, ".parquet": pd.read_parquet, ".pq": pd.read_parquet}
    reader = readers.get(src.suffix.lower())
    if reader is None:
        raise FitError(
            f"{src}: unknown table type {src.suffix!r}; give a .csv or .parquet file "
            "or a store directory"
        )
    try:
        df = reader(src)
    except Exception as exc:  # any reader failure means the user's file is unreadable
        raise FitError(f"{src}: cannot read the table ({type(exc).__name__}: {exc})") from None
    missing = [c for c in REQUIRED if c not in df.columns]
    if missing:
        raise FitError(
            f"{src}: column(s) {', '.join(missing)} missing; a points table needs "
            f"{', '.join(REQUIRED)} (sweepctl merge writes one)"
        )
    optional = (*SLICE_COLUMNS, STRIPS_COLUMN)
    for c in (*REQUIRED, *(s for s in optional if s in df.columns)):
        if not pd.api.types.is_numeric_dtype(df[c]):
            raise FitError(f"{src}: column {c} is not numeric; fix the table")
    return df


@dataclass(frozen=True)
class Slice:
    """One (p_block, p_open, epsilon) slice of a points table."""

    p_block: float | None
    p_open: float | None
    epsilon: float | None

    @property
    def symmetric(self) -> bool:
        """p_block = p_open: the network is self-dual (x_c = 0; [K7] tests/REFERENCES.md)."""
        if self.p_block is None or self.p_open is None:
            return False
        return bool(np.isclose(self.p_block, self.p_open, rtol=0, atol=1e-12))

    def label(self) -> str:
        if self.p_block is None:
            return "all points"
        parts = [f"p_block={self.p_block:g}", f"p_open={self.p_open:g}"]
        if self.epsilon is not None:
            parts.append(f"epsilon={self.epsilon:g}")
        return ", ".join(parts)

    def tag(self) -> str:
        if self.p_block is None:
            return "all"
        eps = "" if self.epsilon is None else f"_eps{self.epsilon:g}"
        return f"pb{self.p_block:g}_po{self.p_open:g}{eps}"


def slices(df: pd.DataFrame) -> list[Slice]:
    """The distinct slices present (one slice of ``None`` if the columns are absent)."""
    have = [c for c in SLICE_COLUMNS if c in df.columns]
    if not {"p_block", "p_open"} <= set(have):
        return [Slice(None, None, None)]
    cols = ["p_block", "p_open"] + (["epsilon"] if "epsilon" in have else [])
    out = []
    for row in df[cols].drop_duplicates().sort_values(cols).itertuples(index=False):
        vals = [float(v) for v in row]
        out.append(Slice(vals[0], vals[1], vals[2] if len(vals) > 2 else None))
    return out


def slice_points(df: pd.DataFrame, sl: Slice) -> pd.DataFrame:
    """The rows of ``df`` in slice ``sl``, sorted by N and x."""
    part = df
    if sl.p_block is not None:
        mask = np.isclose(df["p_block"], sl.p_block) & np.isclose(df["p_open"], sl.p_open)
        if sl.epsilon is not None and "epsilon" in df.columns:
            mask &= np.isclose(df["epsilon"], sl.epsilon)
        part = df[mask]
    return part.sort_values(["N", "x"])


def select(df: pd.DataFrame, sl: Slice) -> ScalingData:
    """The slice's points as :class:`ScalingData` (validated)."""
    part = slice_points(df, sl)
    strips = part[STRIPS_COLUMN] if STRIPS_COLUMN in part.columns else None
    return ScalingData(part["N"], part["x"], part["Gamma"], part["Gamma_err"], strips)


def choose_slice(
    df: pd.DataFrame,
    disorder: tuple[float, float] | None,
    epsilon: float | None,
) -> Slice:
    """The one slice a fit uses; an error listing the choices when it is ambiguous."""
    found = slices(df)
    if disorder is not None:
        found = [
            s
            for s in found
            if s.p_block is not None
            and np.isclose(s.p_block, disorder[0])
            and np.isclose(s.p_open, disorder[1])
        ]
        if not found:
            raise FitError(
                f"--disorder {disorder[0]:g},{disorder[1]:g}: not in the table; present: "
                + "; ".join(s.label() for s in slices(df))
            )
    if epsilon is not None:
        found = [s for s in found if s.epsilon is not None and np.isclose(s.epsilon, epsilon)]
        if not found:
            raise FitError(
                f"--epsilon {epsilon:g}: not in the table; present: "
                + "; ".join(s.label() for s in slices(df))
            )
    if len(found) > 1:
        raise FitError(
            f"the table holds {len(found)} slices ({'; '.join(s.label() for s in found)}); "
            "choose one with --disorder P_BLOCK,P_OPEN and --epsilon E"
        )
    return found[0]
