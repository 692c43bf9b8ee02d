"""Plots and report files of a finite-size-scaling analysis (matplotlib, Markdown, HTML)."""

from __future__ import annotations

import html
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from sweepctl.fss.fit import QUANTITIES, Fit, Intervals, ScalingData
from sweepctl.fss.regularisation import FlatRow, describe_range
from sweepctl.fss.scan import ScanRow

LABELS = {"nu": "ν", "y": "y", "x_c": "x_c", "Gamma_c": "Γ_c"}


def _mpl():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    plt.rcParams.update({"figure.dpi": 110, "savefig.dpi": 150, "font.size": 10})
    return plt


def _save(fig, out: Path, stem: str) -> list[Path]:
    paths = [out / f"{stem}.png", out / f"{stem}.pdf"]
    for p in paths:
        fig.savefig(p, bbox_inches="tight")
    import matplotlib.pyplot as plt

    plt.close(fig)
    return paths


def _colours(widths):
    plt = _mpl()
    cmap = plt.get_cmap("viridis")
    n = max(1, len(widths) - 1)
    return {w: cmap(0.9 * k / n) for k, w in enumerate(widths)}


def plot_gamma_vs_x(data: ScalingData, best: Fit | None, out: Path, stem: str, title: str):
    """Γ against x per width, with error bars and the fitted curves."""
    plt = _mpl()
    fig, ax = plt.subplots(figsize=(6.0, 4.2))
    widths = data.widths()
    col = _colours(widths)
    xs = np.linspace(data.x.min(), data.x.max(), 300)
    for w in widths:
        m = data.N == w
        ax.errorbar(
            data.x[m],
            data.Gamma[m],
            yerr=data.Gamma_err[m],
            fmt="o",
            ms=4,
            capsize=2.5,
            color=col[w],
            label=f"N = {w}",
        )
        if best is not None and w >= best.n_min:
            ax.plot(
                xs,
                best.model.evaluate(best.theta, best.f, xs, np.full_like(xs, w)),
                "-",
                lw=1.2,
                color=col[w],
            )
    ax.set_xlabel("coupling x")
    ax.set_ylabel("Γ = N γ")
    sub = "" if best is None else f"\nfit: {best.model.describe()}, N ≥ {best.n_min} (lines)"
    ax.set_title(title + sub, fontsize=9)
    ax.legend(fontsize=8, frameon=False)
    ax.grid(alpha=0.3)
    return _save(fig, out, stem)


def plot_collapse(data: ScalingData, best: Fit, out: Path, stem: str, title: str):
    """Γ minus the fitted irrelevant correction against ψ_0 = u_0 N^{1/ν}."""
    plt = _mpl()
    d = data.window(best.n_min)
    fig, ax = plt.subplots(figsize=(6.0, 4.2))
    widths = d.widths()
    col = _colours(widths)
    full = best.model.evaluate(best.theta, best.f, d.x, d.N)
    psi0, rel = best.model.relevant_part(best.theta, best.f, d.x, d.N)
    corrected = d.Gamma - (full - rel)
    for w in widths:
        m = d.N == w
        ax.errorbar(
            psi0[m],
            corrected[m],
            yerr=d.Gamma_err[m],
            fmt="o",
            ms=4,
            capsize=2.5,
            color=col[w],
            label=f"N = {w}",
        )
    grid = np.linspace(psi0.min(), psi0.max(), 300)
    curve = best.model.relevant_curve(best.f, grid)
    ax.plot(grid, curve, "k-", lw=1.2, label="F(ψ₀, 0)")
    nu = best.values()["nu"]
    ax.set_xlabel(f"ψ₀ = u₀(x) N^(1/ν),  ν = {nu:.3f}")
    ax.set_ylabel("Γ − irrelevant correction" if best.model.has_irrelevant else "Γ")
    ax.set_title(title + f"\nscaling collapse, {best.model.describe()}", fontsize=9)
    ax.legend(fontsize=8, frameon=False)
    ax.grid(alpha=0.3)
    return _save(fig, out, stem)


def plot_nu_vs_nmin(rows: list[ScanRow], out: Path, stem: str, title: str):
    """ν with its linearised 95 % interval against the smallest width used."""
    plt = _mpl()
    fig, ax = plt.subplots(figsize=(5.5, 4.0))
    models = []
    for r in rows:
        if r.model not in models:
            models.append(r.model)
    for k, m in enumerate(models):
        pts = [r for r in rows if r.model == m and r.fit is not None]
        if not pts:
            continue
        n = np.array([r.n_min for r in pts], float) * (1 + 0.03 * (k - (len(models) - 1) / 2))
        nu = np.array([r.fit.values()["nu"] for r in pts])
        lo = np.array([r.nu_ci()[0] for r in pts])
        hi = np.array([r.nu_ci()[1] for r in pts])
        ax.errorbar(n, nu, yerr=[nu - lo, hi - nu], fmt="o-", ms=4, capsize=3, label=m.describe())
    ax.set_xscale("log", base=2)
    ticks = sorted({r.n_min for r in rows})
    ax.set_xticks(ticks, [str(t) for t in ticks])
    ax.minorticks_off()
    ax.set_xlabel("smallest width used, N_min")
    ax.set_ylabel("ν (95 % interval, linearised)")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7, frameon=False)
    ax.grid(alpha=0.3)
    return _save(fig, out, stem)


def plot_gamma_vs_epsilon(df: pd.DataFrame, out: Path, stem: str, title: str):
    """Γ against ε per width, at the coupling nearest x = 0 (log ε axis)."""
    plt = _mpl()
    fig, ax = plt.subplots(figsize=(5.5, 4.0))
    x0 = float(df["x"].iloc[int(np.argmin(np.abs(df["x"].to_numpy())))])
    part = df[np.isclose(df["x"], x0)]
    widths = sorted(int(n) for n in part["N"].unique())
    col = _colours(widths)
    for w in widths:
        g = part[part["N"] == w].sort_values("epsilon")
        ax.errorbar(
            g["epsilon"],
            g["Gamma"],
            yerr=g["Gamma_err"],
            fmt="o-",
            ms=4,
            capsize=2.5,
            color=col[w],
            label=f"N = {w}",
        )
    ax.set_xscale("log")
    ax.set_xlabel("regularisation ε")
    ax.set_ylabel(f"Γ at x = {x0:g}")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=8, frameon=False)
    ax.grid(alpha=0.3)
    return _save(fig, out, stem)


# -- the report document ---------------------------------------------------------------
@dataclass
class SliceReport:
    label: str
    data: ScalingData
    best: Fit | None
    cis: Intervals | None
    nmin_rows: list[ScanRow] = field(default_factory=list)
    plots: list[Path] = field(default_factory=list)
    note: str = ""


def fit_summary(best: Fit, cis: Intervals | None) -> dict:
    """The issue's JSON fields for one fit."""
    v = best.values()

    def num(z):
        return None if z is None or (isinstance(z, float) and math.isnan(z)) else float(z)

    out = {}
    for q in QUANTITIES:
        out[q] = num(v[q])
        ci = cis.bounds[q] if cis is not None else (math.nan, math.nan)
        if q == "x_c" and best.model.symmetric:
            ci = (0.0, 0.0)  # fixed by duality
        if q == "y" and not best.model.has_y:
            ci = (math.nan, math.nan)
        out[f"{q}_ci"] = [num(ci[0]), num(ci[1])]
    o = best.model.orders
    out.update(
        chi2=float(best.chi2),
        dof=int(best.dof),
        p_value=float(best.p_value),
        orders={"n_R": o.n_R, "n_I": o.n_I, "m_R": o.m_R, "m_I": o.m_I},
        symmetric=best.model.symmetric,
        correction=best.model.correction if best.model.has_irrelevant else None,
        n_min=int(best.n_min),
        points_used=int(best.points_used),
        resamples=None if cis is None else cis.resamples,
        resamples_failed=None if cis is None else cis.failed,
        at_bound=list(best.at_bound),
    )
    return out


def _fmt(z: float | None, digits: int = 4) -> str:
    if z is None or (isinstance(z, float) and not math.isfinite(z)):
        return "—"
    return f"{z:.{digits}f}"


def fit_table(best: Fit, cis: Intervals | None) -> list[list[str]]:
    s = fit_summary(best, cis)
    rows = []
    for q in QUANTITIES:
        if s[q] is None:
            continue
        lo, hi = s[f"{q}_ci"]
        fixed = q == "x_c" and best.model.symmetric
        rows.append(
            [LABELS[q], _fmt(s[q]), "fixed by duality" if fixed else f"[{_fmt(lo)}, {_fmt(hi)}]"]
        )
    return rows


def write_report(
    out: Path,
    provenance: list[tuple[str, str]],
    slices: list[SliceReport],
    flat_rows: list[FlatRow],
    ranges: dict,
    eps_plot: list[Path],
) -> tuple[Path, Path]:
    """report.md and report.html in ``out`` from the computed pieces."""
    blocks: list[tuple[str, object]] = [("h1", "Finite-size-scaling report")]
    blocks.append(("h2", "Campaign provenance"))
    blocks.append(("table", (["item", "value"], [[k, v] for k, v in provenance])))
    for s in slices:
        blocks.append(("h2", f"Fit: {s.label}"))
        if s.best is None:
            blocks.append(("p", s.note))
        else:
            b = s.best
            blocks.append(
                (
                    "p",
                    (
                        f"{b.model.describe()}, N ≥ {b.n_min}, {b.points_used} points, "
                        f"χ² = {b.chi2:.2f} with {b.dof} degrees of freedom, "
                        f"goodness of fit p = {b.p_value:.3f}"
                        + (
                            ""
                            if b.p_value >= 0.1
                            else " (below 0.1: the form does not describe the data)"
                        )
                        + (
                            f"; 95 % intervals from {s.cis.resamples} Gaussian resamples"
                            + (f" ({s.cis.failed} refits failed)" if s.cis.failed else "")
                            if s.cis
                            else ""
                        )
                        + "."
                    ),
                )
            )
            blocks.append(("table", (["quantity", "value", "95 % interval"], fit_table(b, s.cis))))
            if b.at_bound:
                blocks.append(
                    (
                        "p",
                        (
                            f"Warning: {', '.join(b.at_bound)} ended on the bound of the search; "
                            "the data do not determine it (add widths or drop the irrelevant "
                            "field)."
                        ),
                    )
                )
            if s.note:
                blocks.append(("p", s.note))
        if s.nmin_rows:
            blocks.append(
                (
                    "table",
                    (
                        ["form", "N_min", "χ²/dof", "p", "ν", "ν 95 % (linearised)"],
                        [
                            [
                                r.model.describe(),
                                str(r.n_min),
                                _fmt(r.fit.chi2 / r.fit.dof, 2),
                                _fmt(r.fit.p_value, 3),
                                _fmt(r.fit.values()["nu"]),
                                f"[{_fmt(r.nu_ci()[0])}, {_fmt(r.nu_ci()[1])}]",
                            ]
                            for r in s.nmin_rows
                            if r.fit is not None
                        ],
                    ),
                )
            )
        for p in s.plots:
            if p.suffix == ".png":
                blocks.append(("img", p.name))
    blocks.append(("h2", "Regularisation ε"))
    if not flat_rows:
        blocks.append(("p", "The campaign has one ε value; no flatness check is possible."))
    else:
        blocks.append(
            (
                "table",
                (
                    ["p_block", "p_open", "N", "ε values", "χ²", "dof", "p", "flat"],
                    [
                        [
                            f"{r.p_block:g}",
                            f"{r.p_open:g}",
                            str(r.N),
                            ", ".join(f"{e:g}" for e in r.epsilons),
                            _fmt(r.chi2, 2),
                            str(r.dof),
                            _fmt(r.p_value, 3),
                            "yes" if r.flat else "no",
                        ]
                        for r in flat_rows
                    ],
                ),
            )
        )
        for (pb, po), (lo, hi) in ranges.items():
            blocks.append(("p", describe_range(pb, po, lo, hi) + "."))
        for p in eps_plot:
            if p.suffix == ".png":
                blocks.append(("img", p.name))
    md, body = [], []
    for kind, val in blocks:
        if kind == "h1":
            md.append(f"# {val}\n")
            body.append(f"<h1>{html.escape(val)}</h1>")
        elif kind == "h2":
            md.append(f"\n## {val}\n")
            body.append(f"<h2>{html.escape(val)}</h2>")
        elif kind == "p":
            md.append(f"{val}\n")
            body.append(f"<p>{html.escape(val)}</p>")
        elif kind == "img":
            md.append(f"![{val}]({val})\n")
            body.append(f'<p><img src="{html.escape(val)}" alt="{html.escape(val)}"></p>')
        elif kind == "table":
            head, rows = val
            md.append("| " + " | ".join(head) + " |")
            md.append("|" + "---|" * len(head))
            md.extend("| " + " | ".join(r) + " |" for r in rows)
            md.append("")
            body.append(
                "<table><tr>"
                + "".join(f"<th>{html.escape(h)}</th>" for h in head)
                + "</tr>"
                + "".join(
                    "<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in r) + "</tr>"
                    for r in rows
                )
                + "</table>"
            )
    md_path, html_path = out / "report.md", out / "report.html"
    md_path.write_text("\n".join(md) + "\n", encoding="utf-8")
    style = (
        "body{font-family:sans-serif;max-width:60em;margin:2em auto;line-height:1.4}"
        "table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #bbb;"
        "padding:.25em .6em;text-align:left}img{max-width:100%}"
    )
    html_path.write_text(
        "<!DOCTYPE html><html><head><meta charset='utf-8'><title>sweepctl report</title>"
        f"<style>{style}</style></head><body>" + "\n".join(body) + "</body></html>\n",
        encoding="utf-8",
    )
    return md_path, html_path
