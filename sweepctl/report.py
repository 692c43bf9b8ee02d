"""Plots and report files of a finite-size-scaling analysis (matplotlib, Markdown, HTML)."""

from __future__ import annotations

import html
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from sweepctl.fss.criteria import CRITERION_TEXT, leading_order
from sweepctl.fss.effective import Dispersion
from sweepctl.fss.fit import QUANTITIES, Fit, ScalingData
from sweepctl.fss.procedure import Outcome
from sweepctl.fss.regularisation import FlatRow, describe_range
from sweepctl.fss.scan import SCAN_MIN_WIDTHS, ScanRow

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


def plot_effective(outcome: Outcome, out: Path, stem: str, title: str):
    """ν_eff of adjacent width pairs against √(N₁N₂), with the headline ν band."""
    plt = _mpl()
    fig, ax = plt.subplots(figsize=(5.5, 4.0))
    eff = outcome.effective
    n = np.array([e.N_mid for e in eff])
    nu = np.array([e.nu for e in eff])
    err = np.array([e.err for e in eff])
    ax.errorbar(n, nu, yerr=err, fmt="o-", ms=4, capsize=3, label="ν_eff (adjacent widths)")
    if outcome.acceptable:
        lo, hi = outcome.interval("nu")
        ax.axhspan(lo, hi, color="C1", alpha=0.25, label="headline ν, 95 %")
    ax.set_xscale("log", base=2)
    ax.set_xlabel("√(N₁ N₂)")
    ax.set_ylabel("effective exponent ν_eff")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=8, frameon=False)
    ax.grid(alpha=0.3)
    return _save(fig, out, stem)


def cpu_grid(part: pd.DataFrame) -> tuple[list[int], list[float], np.ndarray, np.ndarray]:
    """CPU-hours and replica counts of one slice's points on the (N, x) grid (NaN where
    the campaign has no point): widths, couplings, cpu[N, x], replicas[N, x]."""
    widths = sorted(int(n) for n in part["N"].unique())
    xs = sorted(float(x) for x in part["x"].unique())
    cpu = np.full((len(widths), len(xs)), np.nan)
    reps = np.full_like(cpu, np.nan)
    for r in part.itertuples(index=False):
        i, j = widths.index(int(r.N)), xs.index(float(r.x))
        cpu[i, j] = float(r.cpu_hours)
        reps[i, j] = float(r.replicas)
    return widths, xs, cpu, reps


def plot_cpu_map(part: pd.DataFrame, out: Path, stem: str, title: str) -> list[Path]:
    """Heat map of the CPU-hours spent at each (N, x) of one slice, replica counts
    written in the cells: where a campaign (with a goal, fit-aware) put its replicas."""
    plt = _mpl()
    widths, xs, cpu, reps = cpu_grid(part)
    fig, ax = plt.subplots(figsize=(max(4.0, 0.55 * len(xs) + 2), 0.5 * len(widths) + 1.6))
    im = ax.imshow(cpu, aspect="auto", origin="lower", cmap="magma_r")
    ax.set_xticks(range(len(xs)), [f"{x:g}" for x in xs], rotation=90 if len(xs) > 12 else 0)
    ax.set_yticks(range(len(widths)), [str(n) for n in widths])
    if len(xs) * len(widths) <= 400:
        top = np.nanmax(cpu) if np.isfinite(cpu).any() else 1.0
        for i in range(len(widths)):
            for j in range(len(xs)):
                if np.isfinite(reps[i, j]):
                    ax.text(j, i, f"{int(reps[i, j])}", ha="center", va="center", fontsize=7,
                            color="white" if cpu[i, j] > 0.6 * top else "black")  # fmt: skip
    ax.set_xlabel("x")
    ax.set_ylabel("N")
    ax.set_title(title)
    fig.colorbar(im, ax=ax, label="CPU-hours")
    return _save(fig, out, stem)


def cpu_rows(part: pd.DataFrame) -> list[list[str]]:
    """Per width: replicas, CPU-hours and share of the slice's CPU, and the couplings
    that took the most CPU."""
    widths, xs, cpu, reps = cpu_grid(part)
    total = float(np.nansum(cpu))
    rows = []
    for i, n in enumerate(widths):
        c = float(np.nansum(cpu[i]))
        top = [xs[j] for j in np.argsort(-np.nan_to_num(cpu[i], nan=-1.0))[:2]]
        rows.append(
            [
                str(n),
                str(int(np.nansum(reps[i]))),
                f"{c:.4g}",
                f"{100 * c / total:.0f} %" if total > 0 else "—",
                ", ".join(f"{x:g}" for x in top),
            ]
        )
    return rows


CPU_HEAD = ["N", "replicas", "CPU-hours", "share", "dearest x"]


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


@dataclass
class SliceReport:
    label: str
    data: ScalingData
    outcome: Outcome | None
    plots: list[Path] = field(default_factory=list)
    note: str = ""
    #: the slice's per-point table (N, x, replicas, cpu_hours) when it came from a store
    points: pd.DataFrame | None = None
    cpu_plots: list[Path] = field(default_factory=list)


def _num(z):
    if z is None:
        return None
    z = float(z)
    return None if math.isnan(z) else z


def _pair(p):
    return [_num(p[0]), _num(p[1])]


def _form(model) -> dict:
    o = model.orders
    return {
        "orders": {"n_R": o.n_R, "n_I": o.n_I, "m_R": o.m_R, "m_I": o.m_I},
        "symmetric": model.symmetric,
        "correction": model.correction if model.has_irrelevant else None,
        "fixed_y": model.fixed_y,
    }


def _attempt(r: ScanRow) -> dict:
    d = {**_form(r.model), "n_min": int(r.n_min)}
    if r.fit is None:
        return {**d, "error": r.error}
    return {
        **d,
        "nu": _num(r.fit.values()["nu"]),
        "nu_ci_linearised": _pair(r.nu_ci()),
        "chi2": float(r.fit.chi2),
        "dof": int(r.fit.dof),
        "p_value": float(r.fit.p_value),
        "at_bound": list(r.fit.at_bound),
        "minima": len(r.minima),
    }


def ruled_out_summary(o: Outcome) -> list[dict]:
    """The acceptable fits the physics criterion ruled out ([M8] tests/REFERENCES.md)."""
    out = []
    for kind, f in o.ruled_out():
        v = leading_order(f)
        out.append(
            {
                "kind": kind,
                **_form(f.model),
                "n_min": int(f.n_min),
                "nu": _num(f.values()["nu"]),
                "y": _num(f.values()["y"]),
                "Gamma_c": _num(f.values()["Gamma_c"]),
                "chi2": float(f.chi2),
                "dof": int(f.dof),
                "p_value": float(f.p_value),
                "correction_share": _num(v.share),
                "at_width": v.width,
            }
        )
    return out


def outcome_summary(o: Outcome) -> dict:
    """The JSON of ``fit --json`` and of each slice in ``fits.json``."""
    out: dict = {
        "acceptable": o.acceptable,
        "procedure": "scan" if o.mode == "scan" else "one form",
        "max_orders": o.max_orders.label() if o.max_orders is not None else None,
        "effective_exponents": [
            {"N1": e.N1, "N2": e.N2, "nu": e.nu, "err": e.err, "kind": e.kind} for e in o.effective
        ],
    }
    d = o.dispersion
    out["dispersion"] = (
        None
        if d is None
        else {
            "chi2": d.chi2,
            "dof": d.dof,
            "p_value": d.p_value,
            "degree": d.degree,
            "estimated_variances": d.estimated,
        }
    )
    out["criterion"] = CRITERION_TEXT
    out["ruled_out"] = ruled_out_summary(o)
    if not o.acceptable:
        out["verdict"] = "no acceptable form"
        for q in QUANTITIES:
            out[q] = None
            out[f"{q}_ci"] = [None, None]
        out["attempts"] = [_attempt(r) for r in o.rows]
        return out
    best = o.best
    v = best.values()
    for q in QUANTITIES:
        out[q] = _num(v[q])
        ci = o.interval(q)
        if q == "x_c" and best.model.symmetric:
            ci = (0.0, 0.0)  # fixed by duality
        if q == "y" and not best.model.has_y:
            ci = (math.nan, math.nan)
        out[f"{q}_ci"] = _pair(ci)
    stat = o.branches[0].cis
    out.update(
        nu_ci_statistical=_pair(stat.bounds["nu"]),
        Gamma_c_ci_statistical=_pair(stat.bounds["Gamma_c"]),
        chi2=float(best.chi2),
        dof=int(best.dof),
        p_value=float(best.p_value),
        gof_method=best.gof_method,
        **_form(best.model),
        n_min=int(best.n_min),
        points_used=int(best.points_used),
        resamples=stat.resamples,
        resamples_failed=stat.failed,
        at_bound=list(best.at_bound),
        ambiguous=o.ambiguous,
        branches_disagree=o.branches_disagree,
        disagreeing_forms=[_attempt(r) for r in o.disagreeing_forms()],
        branches=[
            {
                "nu": _num(b.fit.values()["nu"]),
                "nu_ci": _pair(b.cis.bounds["nu"]),
                "y": _num(b.fit.values()["y"]),
                "x_c": _num(b.fit.values()["x_c"]),
                "Gamma_c": _num(b.fit.values()["Gamma_c"]),
                "chi2": float(b.fit.chi2),
                "dof": int(b.fit.dof),
                "p_value": float(b.fit.p_value),
            }
            for b in o.branches
        ],
        nu_model_spread=_pair(o.model_spread("nu")),
        nu_budget=_pair(o.nu_budget()),
        Gamma_c_model_spread=_pair(o.model_spread("Gamma_c")),
        stable_forms=[_attempt(r) for r in o.stable_forms],
        correction_sensitivity=o.sensitivity_reason or None,
        fixed_y_fits=[_attempt(r) for r in o.sensitivity if r.acceptable],
        effective_outside_headline=o.effective_outside() is not None,
        nu_range=_pair(o.value_range("nu")),
        Gamma_c_range=_pair(o.value_range("Gamma_c")),
    )
    return out


def _fmt(z: float | None, digits: int = 4) -> str:
    if z is None or (isinstance(z, float) and not math.isfinite(z)):
        return "—"
    return f"{z:.{digits}f}"


def _iv(p, digits: int = 4) -> str:
    return f"[{_fmt(p[0], digits)}, {_fmt(p[1], digits)}]"


def headline_rows(o: Outcome) -> list[list[str]]:
    """quantity, value, 95 % interval (statistical and branches), model-choice spread."""
    s = outcome_summary(o)
    rows = []
    for q in QUANTITIES:
        if s[q] is None:
            continue
        fixed = q == "x_c" and o.best.model.symmetric
        spread = "" if fixed else _iv(o.model_spread(q))
        if q == "y" and not o.best.model.has_y:
            rows.append([LABELS[q], _fmt(s[q]), "fixed" if s[q] is not None else "—", ""])
            continue
        rows.append(
            [LABELS[q], _fmt(s[q]), "fixed by duality" if fixed else _iv(s[f"{q}_ci"]), spread]
        )
    return rows


HEADLINE_HEAD = ["quantity", "value", "95 % interval", "model-choice spread"]
BRANCH_HEAD = ["branch", "ν", "ν 95 %", "y", "x_c", "Γ_c", "χ²", "dof", "p"]
ATTEMPT_HEAD = ["form", "N_min", "χ²/dof", "p", "ν", "ν 95 % (linearised)", "note"]
EFFECTIVE_HEAD = ["widths", "√(N₁N₂)", "ν_eff", "±", "from"]


def branch_rows(o: Outcome) -> list[list[str]]:
    rows = []
    for k, b in enumerate(o.branches, 1):
        v = b.fit.values()
        rows.append(
            [
                str(k),
                _fmt(v["nu"]),
                _iv(b.cis.bounds["nu"]),
                _fmt(v["y"], 3),
                _fmt(v["x_c"], 4),
                _fmt(v["Gamma_c"]),
                _fmt(b.fit.chi2, 2),
                str(b.fit.dof),
                _fmt(b.fit.p_value, 3),
            ]
        )
    return rows


def attempt_rows(rows: list[ScanRow], mark: ScanRow | None = None) -> list[list[str]]:
    out = []
    for r in rows:
        if r.fit is None:
            out.append([r.model.describe(), str(r.n_min), "—", "—", "—", "—", "failed"])
            continue
        note = "◀ stable choice" if r is mark else ""
        if r.fit.at_bound:
            note = f"{', '.join(r.fit.at_bound)} at bound"
        elif len(r.minima) > 1:
            accepted = sum(1 for f in r.minima if f.p_value >= 0.1 and not f.at_bound)
            note = (note + f" {len(r.minima)} minima, {accepted} acceptable").strip()
        out.append(
            [
                r.model.describe(),
                str(r.n_min),
                _fmt(r.fit.chi2 / r.fit.dof, 2),
                _fmt(r.fit.p_value, 3),
                _fmt(r.fit.values()["nu"]),
                _iv(r.nu_ci(), 3),
                note,
            ]
        )
    return out


def effective_rows(o: Outcome) -> list[list[str]]:
    return [
        [f"{e.N1}, {e.N2}", _fmt(e.N_mid, 1), _fmt(e.nu, 3), _fmt(e.err, 3), e.kind]
        for e in o.effective
    ]


def _dispersion_words(d: Dispersion | None) -> list[str]:
    """What the form-free check of the error bars says, when no form is acceptable."""
    if d is None:
        return []
    how = ", estimated variances" if d.estimated else ""
    head = (
        f"Without a scaling form, one polynomial of degree ≤ {d.degree} in x per width gives "
        f"χ² = {d.chi2:.1f} for {d.dof} dof (p = {d.p_value:.3f}{how}): "
    )
    if d.p_value < 0.1:
        return [
            head + "the points scatter more than their error bars suggest even there, which "
            "pulls every form's p down. Before raising the orders, run more strips per "
            "point (a tighter target): that tells a fluctuation from error bars that are "
            "too small."
        ]
    return [
        head + "the error bars are consistent with the points width by width, so the forms "
        "are what fails: raise the orders, or add larger widths."
    ]


def words(o: Outcome) -> list[str]:
    """The outcome in sentences (printed by ``fit``, written into the report)."""
    ruled = _ruled_out_words(o)
    if not o.acceptable:
        what = (
            f"orders up to {o.max_orders.label()} at every N_min leaving {SCAN_MIN_WIDTHS} or "
            "more widths"
            if o.mode == "scan"
            else o.rows[0].model.describe()
        )
        return [
            f"no acceptable form: {what} gave no fit with p ≥ 0.1 (and no parameter on a "
            "bound) that is stable when the smallest widths are dropped and determines ν; "
            "no ν or Γ_c is reported. The attempts and the effective exponents of adjacent "
            "widths are listed; add widths or points, or raise the orders.",
            *_dispersion_words(o.dispersion),
            *ruled,
        ]
    b = o.best
    out = []
    how = (
        f"stable choice of the scan over orders up to {o.max_orders.label()} and every N_min"
        if o.mode == "scan"
        else "the requested form"
    )
    out.append(
        f"{b.model.describe()}, N ≥ {b.n_min}, {b.points_used} points ({how}): "
        f"χ² = {b.chi2:.2f}, dof = {b.dof}, p = {b.p_value:.3f}; 95 % intervals from "
        f"{o.branches[0].cis.resamples} resampled refits"
        + (f" ({o.branches[0].cis.failed} failed)" if o.branches[0].cis.failed else "")
        + "."
    )
    if len(o.branches) > 1:
        nus = ", ".join(f"{br.fit.values()['nu']:.3f}" for br in o.branches)
        if o.branches_disagree:
            out.append(
                f"AMBIGUOUS: the form has {len(o.branches)} acceptable branches with ν = {nus} "
                "whose intervals do not overlap; the data cannot decide between them, so the "
                "headline interval covers every branch (the leading-order criterion rules "
                "none of them out)."
            )
        else:
            out.append(
                f"The form has {len(o.branches)} acceptable branches (ν = {nus}); their "
                "intervals overlap, and the headline interval covers all of them."
            )
    for r in o.disagreeing_forms():
        lo, hi = r.nu_ci()
        out.append(
            f"AMBIGUOUS: {r.model.describe()} is also stable (N ≥ {r.n_min}, p = "
            f"{r.fit.p_value:.3f}) and gives ν = {r.fit.values()['nu']:.3f} [{lo:.3f}, "
            f"{hi:.3f}] (linearised), outside the headline interval; the data cannot decide "
            "between the forms."
        )
    lo, hi = o.model_spread("nu")
    slo, shi = o.interval("nu")
    if len(o.stable_forms) > 1:
        extra = (
            " — wider than the statistical interval: the choice of form matters"
            if lo < slo or hi > shi
            else ""
        )
        out.append(
            f"Model choice: {len(o.stable_forms)} stable forms give ν from {lo:.3f} to "
            f"{hi:.3f}{extra}."
        )
    blo, bhi = o.nu_budget()
    if blo < slo or bhi > shi:
        out.append(
            f"With the choice of form: ν in [{blo:.3f}, {bhi:.3f}], the hull of the "
            "headline interval and the 95 % intervals of the stable forms near it (the "
            "interval to quote when the forms' intervals differ)."
        )
    if o.sensitivity_reason:
        ok = o.sensitivity_fits()
        out.append(
            f"Correction sensitivity ({o.sensitivity_reason}): refitted with y fixed at each of "
            + ", ".join(f"{y:g}" for y in sorted({r.model.fixed_y for r in o.sensitivity}))
            + f" at every N_min; {len(ok)} of {len(o.sensitivity)} fixed-y fits are acceptable "
            "and not ruled out."
        )
    out += ruled
    e = o.effective_outside()
    if e is not None:
        out.append(
            f"Caution: the effective exponent of the two largest widths ({e.N1}, {e.N2}), "
            f"ν_eff = {e.nu:.3f} ± {e.err:.3f}, lies outside the headline interval: "
            "corrections to scaling are still large at these widths, or the form is wrong; "
            "wider strips decide."
        )
    nlo, nhi = o.value_range("nu")
    glo, ghi = o.value_range("Gamma_c")
    out.append(
        f"Over every acceptable fit not ruled out (branches, stable forms, fixed-y fits) ν "
        f"ranges over "
        f"[{nlo:.3f}, {nhi:.3f}] and Γ_c over [{glo:.4f}, {ghi:.4f}]."
    )
    return out


def _ruled_out_words(o: Outcome) -> list[str]:
    ruled = o.ruled_out()
    if not ruled:
        return []
    nus = sorted(f.values()["nu"] for _, f in ruled)
    shares = [leading_order(f).share for _, f in ruled]
    return [
        f"Ruled out: {len(ruled)} acceptable fit(s) with ν from {nus[0]:.3f} to {nus[-1]:.3f}, "
        f"whose irrelevant-field terms carry {min(shares):.1f}–{max(shares):.1f} times the "
        "relevant field's x-dependence at the largest width. Criterion: " + CRITERION_TEXT + "."
    ]


def nmin_rows(o: Outcome) -> list[ScanRow]:
    """Rows of the chosen form (or the one form) against N_min, for the ν–N_min plot."""
    model = o.choice.model if o.choice is not None else o.rows[0].model
    return [r for r in o.rows if r.model == model and r.fit is not None]


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
        o = s.outcome
        if o is None:
            blocks.append(("p", s.note))
        else:
            blocks += [("p", w) for w in words(o)]
            if o.acceptable:
                blocks.append(("table", (HEADLINE_HEAD, headline_rows(o))))
                blocks.append(("table", (BRANCH_HEAD, branch_rows(o))))
                if len(o.stable_forms) > 1:
                    blocks.append(("table", (ATTEMPT_HEAD, attempt_rows(o.stable_forms, o.choice))))
                if o.best.at_bound:
                    blocks.append(
                        (
                            "p",
                            f"Warning: {', '.join(o.best.at_bound)} ended on the bound of the "
                            "search; the data do not determine it.",
                        )
                    )
            else:
                blocks.append(("table", (ATTEMPT_HEAD, attempt_rows(o.rows))))
            if o.effective:
                blocks.append(("table", (EFFECTIVE_HEAD, effective_rows(o))))
            rows = nmin_rows(o)
            if rows and o.acceptable:
                blocks.append(("table", (ATTEMPT_HEAD, attempt_rows(rows, o.choice))))
            if s.note:
                blocks.append(("p", s.note))
        for p in s.plots:
            if p.suffix == ".png":
                blocks.append(("img", p.name))
        if s.points is not None and "cpu_hours" in s.points.columns:
            blocks.append(
                (
                    "p",
                    "Where the CPU went: CPU-hours at each (N, x) of this slice, replica "
                    "counts in the cells.",
                )
            )
            blocks.append(("table", (CPU_HEAD, cpu_rows(s.points))))
            for p in s.cpu_plots:
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
