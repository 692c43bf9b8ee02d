"""Driver of the analysis: points → fits → resampled intervals (on Dask) → report files.

The numerical work lives in :mod:`sweepctl.fss` (numpy/scipy only); this module adds the
Dask cluster for the resampling, progress reports and the files of ``sweepctl report``.
"""

from __future__ import annotations

import contextlib
import os
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from sweepctl.errors import SweepctlError
from sweepctl.fss import procedure
from sweepctl.fss.data import Slice, choose_slice, read_points, select, slice_points, slices
from sweepctl.fss.fit import FitError, ScalingData
from sweepctl.fss.model import Orders
from sweepctl.fss.procedure import DEFAULT_MAX_ORDERS, DEFAULT_RESAMPLES, Outcome
from sweepctl.fss.regularisation import epsilon_check
from sweepctl.jsonout import json_text

Progress = Callable[[str, int, int], None]


class AnalysisError(SweepctlError):
    """Unusable input to fit or report (one line naming the field, value and fix)."""


@dataclass
class FitRequest:
    #: one form to fit; ``None``: the full procedure (scan → stable choice → refit)
    orders: Orders | None = None
    n_min: int | None = None
    symmetric: bool | None = None  # None: symmetric when p_block = p_open
    correction: str = "power"
    disorder: tuple[float, float] | None = None
    epsilon: float | None = None
    resamples: int = DEFAULT_RESAMPLES
    seed: int = 0
    level: float = 0.95
    max_orders: Orders = field(default_factory=lambda: DEFAULT_MAX_ORDERS)


#: the automatic choice runs the resampling in this process unless the first chunk says
#: the rest would take longer than this many CPU seconds here
IN_PROCESS_SECONDS = 30.0


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


def _in_process(progress: Progress | None):
    def mapper(func, jobs):
        out = []
        for k, job in enumerate(jobs):
            out.append(func(*job))
            if progress is not None:
                progress("resampling", k + 1, len(jobs))
        return out

    return mapper


@contextlib.contextmanager
def resampling_mapper(
    workers: int | None = None,
    scheduler: str | None = None,
    scheduler_file: str | None = None,
    progress: Progress | None = None,
) -> Iterator[Callable]:
    """Where the resampled refits run.

    ``workers = 0``: in this process.  ``workers ≥ 1`` or a scheduler: on Dask (a local
    cluster of that many workers, or the given scheduler).  ``workers = None`` and no
    scheduler (automatic): the first chunk runs here and is timed (process CPU time); if
    the remaining chunks would take more than :data:`IN_PROCESS_SECONDS` and the machine
    has more than one core, a local Dask cluster runs them, else this process does.
    Results do not depend on the choice (chunks are seeded by index).
    """
    if workers == 0 and scheduler is None and scheduler_file is None:
        yield _in_process(progress)
        return
    if workers is not None or scheduler is not None or scheduler_file is not None:
        with dask_mapper(workers, scheduler, scheduler_file, progress) as m:
            yield m
        return
    stack = contextlib.ExitStack()

    def mapper(func, jobs):
        if not jobs:
            return []
        t0 = time.process_time()
        first = func(*jobs[0])
        rest_seconds = (time.process_time() - t0) * (len(jobs) - 1)
        if progress is not None:
            progress("resampling", 1, len(jobs))
        if rest_seconds > IN_PROCESS_SECONDS and (os.cpu_count() or 1) > 1:
            dask = stack.enter_context(dask_mapper(None, None, None, None))
            rest = dask(func, jobs[1:])
        else:
            rest = _in_process(None)(func, jobs[1:])
        if progress is not None:
            progress("resampling", len(jobs), len(jobs))
        return [first, *rest]

    with stack:
        yield mapper


def load(source: str | Path) -> pd.DataFrame:
    try:
        return read_points(source)
    except FitError as exc:
        raise AnalysisError(str(exc)) from None


def symmetric_for(sl: Slice, req: FitRequest) -> bool:
    sym = sl.symmetric if req.symmetric is None else req.symmetric
    if sym and not sl.symmetric and sl.p_block is not None:
        raise AnalysisError(
            f"--symmetric: p_block = {sl.p_block:g} and p_open = {sl.p_open:g} differ, so the "
            "network is not self-dual; drop --symmetric"
        )
    return sym


def analyse(
    data: ScalingData, sym: bool, req: FitRequest, mapper=None, progress: Progress | None = None
) -> Outcome:
    """The shared procedure (:func:`sweepctl.fss.procedure.run`) with the request's options."""
    if req.correction not in ("power", "log"):
        raise AnalysisError(f"--correction: {req.correction!r} is not power or log; choose one")
    if req.n_min is not None and req.n_min not in data.widths():
        raise AnalysisError(
            f"--n-min {req.n_min}: not one of the widths {data.widths()}; choose one"
        )
    try:
        return procedure.run(
            data,
            symmetric=sym,
            orders=req.orders,
            correction=req.correction,
            n_min=req.n_min,
            max_orders=req.max_orders,
            resamples=req.resamples,
            seed=req.seed,
            level=req.level,
            mapper=mapper,
            progress=progress,
        )
    except (FitError, ValueError) as exc:
        raise AnalysisError(str(exc)) from None


def fit_source(
    df: pd.DataFrame, req: FitRequest, mapper=None, progress: Progress | None = None
) -> tuple[Slice, Outcome]:
    """The procedure on the one slice the request names (``sweepctl fit``)."""
    try:
        sl = choose_slice(df, req.disorder, req.epsilon)
        data = select(df, sl)
    except FitError as exc:
        raise AnalysisError(str(exc)) from None
    return sl, analyse(data, symmetric_for(sl, req), req, mapper, progress)


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
    """Run the procedure on every slice of a store; plots, report.md, report.html and
    fits.json into ``out``."""
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
        outcome = None
        note = ""
        try:
            outcome = analyse(data, sym, req, mapper)
        except AnalysisError as exc:
            note = f"No fit: {exc}"
        s = rp.SliceReport(sl.label(), data, outcome, note=note)
        title = sl.label()
        part = slice_points(df, sl)
        if {"cpu_hours", "replicas"} <= set(part.columns):
            s.points = part
            s.cpu_plots = rp.plot_cpu_map(part, out, f"cpu_{sl.tag()}", f"{title}: CPU-hours")
            all_plots += s.cpu_plots
        best = outcome.best if outcome is not None else None
        s.plots += rp.plot_gamma_vs_x(data, best, out, f"gamma_vs_x_{sl.tag()}", title)
        if best is not None:
            s.plots += rp.plot_collapse(data, best, out, f"collapse_{sl.tag()}", title)
        if outcome is not None:
            rows = rp.nmin_rows(outcome)
            if rows:
                s.plots += rp.plot_nu_vs_nmin(
                    rows, out, f"nu_vs_nmin_{sl.tag()}", f"{title}: ν against N_min"
                )
            if outcome.effective:
                s.plots += rp.plot_effective(
                    outcome, out, f"nu_effective_{sl.tag()}", f"{title}: effective exponent"
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
        s.label: (rp.outcome_summary(s.outcome) if s.outcome is not None else {"error": s.note})
        for s in reports
    }
    (out / "fits.json").write_text(json_text(summary) + "\n")  # strict, like every --json
    md, html_path = rp.write_report(out, prov, reports, flat_rows, ranges, eps_plots)
    return md, html_path, all_plots
