"""Driver of the analysis: points → fits → resampled intervals (on Dask) → report files.

The numerical work lives in :mod:`sweepctl.fss` (numpy/scipy only); this module adds the
Dask cluster for the resampling, progress reports and the files of ``sweepctl report``.
"""

from __future__ import annotations

import contextlib
import json
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from sweepctl.errors import SweepctlError
from sweepctl.fss.data import Slice, choose_slice, read_points, select, slices
from sweepctl.fss.fit import Fit, FitError, Intervals, ScalingData, fit, resampled_intervals
from sweepctl.fss.model import Orders, ScalingModel
from sweepctl.fss.regularisation import epsilon_check
from sweepctl.fss.scan import ScanRow, scan, stable_choice

Progress = Callable[[str, int, int], None]


class AnalysisError(SweepctlError):
    """Unusable input to fit or report (one line naming the field, value and fix)."""


@dataclass
class FitRequest:
    orders: Orders = field(default_factory=Orders)
    n_min: int | None = None
    symmetric: bool | None = None  # None: symmetric when p_block = p_open
    correction: str = "power"
    disorder: tuple[float, float] | None = None
    epsilon: float | None = None
    resamples: int = 200
    seed: int = 0
    level: float = 0.95
    auto_orders: bool = False  # report: take the scan's stable choice per slice


#: largest orders the report's automatic scan tries
REPORT_MAX_ORDERS = Orders(4, 1, 3, 1)


@contextlib.contextmanager
def dask_mapper(
    workers: int | None = None,
    scheduler: str | None = None,
    scheduler_file: str | None = None,
    progress: Progress | None = None,
) -> Iterator[Callable]:
    """A ``mapper(func, jobs)`` that runs jobs on Dask (embedded cluster by default)."""
    from sweepctl.campaign.connect import Connection, RunOptions

    conn = Connection(
        RunOptions(workers=workers, scheduler=scheduler, scheduler_file=scheduler_file)
    )

    def mapper(func, jobs):
        from distributed import as_completed

        futures = [
            conn.client.submit(func, *job, key=f"sweepctl-resample-{k}-{id(jobs)}", pure=False)
            for k, job in enumerate(jobs)
        ]
        done = 0
        for _ in as_completed(futures):
            done += 1
            if progress is not None:
                progress("resampling", done, len(futures))
        return [f.result() for f in futures]

    try:
        yield mapper
    finally:
        conn.close()


def load(source: str | Path) -> pd.DataFrame:
    try:
        return read_points(source)
    except FitError as exc:
        raise AnalysisError(str(exc)) from None


def model_for(sl: Slice, req: FitRequest) -> ScalingModel:
    sym = sl.symmetric if req.symmetric is None else req.symmetric
    if sym and not sl.symmetric and sl.p_block is not None:
        raise AnalysisError(
            f"--symmetric: p_block = {sl.p_block:g} and p_open = {sl.p_open:g} differ, so the "
            "network is not self-dual; drop --symmetric"
        )
    try:
        return ScalingModel(req.orders, symmetric=sym, correction=req.correction)
    except ValueError as exc:
        raise AnalysisError(f"--correction: {exc}") from None


def fit_source(
    df: pd.DataFrame, req: FitRequest, mapper=None
) -> tuple[Slice, ScalingData, Fit, Intervals]:
    """Best fit of the requested model to one slice and its resampled intervals."""
    try:
        sl = choose_slice(df, req.disorder, req.epsilon)
        data = select(df, sl)
        model = model_for(sl, req)
        if req.n_min is not None and req.n_min not in data.widths():
            raise FitError(
                f"--n-min {req.n_min}: not one of the widths {data.widths()}; choose one"
            )
        best = fit(data, model, n_min=req.n_min)
        cis = resampled_intervals(
            data, best, resamples=req.resamples, seed=req.seed, level=req.level, mapper=mapper
        )
    except FitError as exc:
        raise AnalysisError(str(exc)) from None
    return sl, data, best, cis


def scan_source(
    df: pd.DataFrame, req: FitRequest, max_orders: Orders, progress: Progress | None = None
) -> tuple[Slice, list[ScanRow], ScanRow | None]:
    try:
        sl = choose_slice(df, req.disorder, req.epsilon)
        data = select(df, sl)
    except FitError as exc:
        raise AnalysisError(str(exc)) from None
    sym = model_for(sl, req).symmetric
    cb = None if progress is None else (lambda k, n: progress("scanning", k, n))
    rows = scan(data, max_orders, symmetric=sym, with_log=True, progress=cb)
    return sl, rows, stable_choice(rows)


def provenance(store_dir: Path) -> list[tuple[str, str]]:
    """Campaign facts for the report: code versions, entropy, replicas, CPU-hours."""
    from sweepctl.campaign.store import Store
    from sweepctl.campaign.summary import store_recipe

    store = Store(store_dir)
    campaign, _, frozen = store_recipe(store)
    t = store.read_replicas(
        columns=["sweepctl_version", "git_commit", "numpy_version", "cpu_seconds", "layers"]
    )
    codes = sorted(
        {
            f"sweepctl {v} (commit {c[:12]}), numpy {n}"
            for v, c, n in zip(
                t.column("sweepctl_version").to_pylist(),
                t.column("git_commit").to_pylist(),
                t.column("numpy_version").to_pylist(),
                strict=True,
            )
        }
    )
    cpu = sum(t.column("cpu_seconds").to_pylist()) / 3600
    hist = campaign["recipe_history"]
    return [
        ("campaign", str(campaign["name"])),
        ("store", str(store_dir)),
        ("created", str(campaign["created"])),
        ("entropy", frozen.entropy if isinstance(frozen.entropy, str) else hex(frozen.entropy)),
        ("recipe digest (latest)", str(hist[-1]["digest"])),
        ("recipe versions", str(len(hist))),
        ("code that produced the rows", "; ".join(codes) or "—"),
        ("replicas", f"{t.num_rows:,}"),
        ("layers", f"{sum(t.column('layers').to_pylist()):,}"),
        ("CPU-hours", f"{cpu:.3f}"),
        ("strips per replica", str(frozen.strips)),
        ("warm-up layers", "max(5N, 32)" if frozen.warmup is None else str(frozen.warmup)),
        ("precision target", f"{campaign['target']:g}"),
    ]


def build_report(
    store_dir: Path,
    out: Path,
    req: FitRequest,
    mapper=None,
    progress: Progress | None = None,
) -> tuple[Path, Path, list[Path]]:
    """Fit every slice of a store and write plots, report.md and report.html into ``out``."""
    from sweepctl import report as rp

    if not (Path(store_dir) / "campaign.json").exists():
        raise AnalysisError(f"{store_dir}: sweepctl report needs a store directory")
    df = load(store_dir)
    out.mkdir(parents=True, exist_ok=True)
    prov = provenance(Path(store_dir))
    reports = []
    all_plots: list[Path] = []
    todo = slices(df)
    for k, sl in enumerate(todo):
        data = select(df, sl)
        sym = sl.symmetric if req.symmetric is None else req.symmetric and sl.symmetric
        model = ScalingModel(req.orders, symmetric=sym, correction=req.correction)
        n_min = req.n_min
        best = cis = None
        note = ""
        if req.auto_orders:
            # the practitioner's choice: the scan's stable form, else the default orders
            choice = stable_choice(scan(data, REPORT_MAX_ORDERS, symmetric=sym, with_log=False))
            if choice is not None:
                model, n_min = choice.model, choice.n_min
                note = (
                    f"Form chosen by the scan over orders up to {REPORT_MAX_ORDERS.label()} "
                    "and every N_min (fewest parameters with p ≥ 0.1 and ν unchanged when "
                    "the smallest widths are dropped)."
                )
            else:
                note = (
                    f"The scan over orders up to {REPORT_MAX_ORDERS.label()} found no stable "
                    f"form; shown: the default orders {req.orders.label()} (treat with care)."
                )
        try:
            best = fit(data, model, n_min=n_min)
            cis = resampled_intervals(
                data, best, resamples=req.resamples, seed=req.seed, mapper=mapper
            )
        except FitError as exc:
            note = f"{note} No fit: {exc}".strip()
        # ν against N_min for the requested form and, for comparison, without its
        # irrelevant field (which can be fitted on one width fewer)
        forms = [model]
        if model.has_irrelevant:
            o = model.orders
            forms.append(ScalingModel(Orders(o.n_R, 0, o.m_R, 0), symmetric=model.symmetric))
        nmin_rows = []
        for m in forms:
            for n in data.widths():
                with contextlib.suppress(FitError):
                    nmin_rows.append(ScanRow(m, n, fit(data, m, n_min=n)))
        s = rp.SliceReport(sl.label(), data, best, cis, nmin_rows, note=note)
        title = sl.label()
        s.plots += rp.plot_gamma_vs_x(data, best, out, f"gamma_vs_x_{sl.tag()}", title)
        if best is not None:
            s.plots += rp.plot_collapse(data, best, out, f"collapse_{sl.tag()}", title)
        if len(nmin_rows) >= 1:
            s.plots += rp.plot_nu_vs_nmin(
                nmin_rows, out, f"nu_vs_nmin_{sl.tag()}", f"{title}: ν against N_min"
            )
        reports.append(s)
        all_plots += s.plots
        if progress is not None:
            progress("fitting slices", k + 1, len(todo))
    flat_rows, ranges = epsilon_check(df)
    eps_plots: list[Path] = []
    if flat_rows:
        for (pb, po), g in df.groupby(["p_block", "p_open"]):
            eps_plots += rp.plot_gamma_vs_epsilon(
                g,
                out,
                f"gamma_vs_epsilon_pb{pb:g}_po{po:g}",
                f"p_block={pb:g}, p_open={po:g}: Γ against ε",
            )
    all_plots += eps_plots
    summary = {
        s.label: (rp.fit_summary(s.best, s.cis) if s.best is not None else {"error": s.note})
        for s in reports
    }
    (out / "fits.json").write_text(json.dumps(summary, indent=2) + "\n")
    md, html_path = rp.write_report(out, prov, reports, flat_rows, ranges, eps_plots)
    return md, html_path, all_plots
