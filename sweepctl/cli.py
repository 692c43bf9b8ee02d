"""Command-line interface: parse, call, print. All terminal output lives here."""

from __future__ import annotations

import contextlib
import json
import os
import sys
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from sweepctl import __version__
from sweepctl.errors import SweepctlError
from sweepctl.jsonout import json_text

app = typer.Typer(
    help="Seeded, resumable Lyapunov-exponent campaigns for network models.",
    no_args_is_help=True,
    add_completion=True,  # --install-completion / --show-completion for the user's shell
    pretty_exceptions_enable=False,
)


def _flags_without_type() -> None:
    """Help screens show flags as flags: this typer prints ``--json <bool>`` as if the
    flag took a value (its type column is filled for every option)."""
    core = getattr(typer, "core", None)
    option = getattr(core, "TyperOption", None)
    original = getattr(option, "display_type_rich", None)
    if original is None or getattr(original, "_sweepctl", False):
        return

    def display_type_rich(self, ctx):
        return None if getattr(self, "is_flag", False) else original(self, ctx)

    display_type_rich._sweepctl = True
    option.display_type_rich = display_type_rich


_flags_without_type()

#: width of tables written to a file or pipe (a log): rich's default there is 80 columns,
#: which cut the headers of `bench` and `status` to "layer…"
LOG_WIDTH = 140


def _console(stderr: bool = False) -> Console:
    c = Console(stderr=stderr)
    if not c.is_terminal and "COLUMNS" not in os.environ:
        c = Console(stderr=stderr, width=LOG_WIDTH)
    return c


console = _console()
err_console = _console(stderr=True)
_DEBUG = {"on": False}


class UserError(SweepctlError):
    """A mistake in the user's input: printed as one line, exit code 2."""


def _fail(message: str, code: int = 2) -> None:
    # escaped: messages name TOML tables like [precision], which are markup to rich
    err_console.print(f"[bold red]error:[/] {escape(message)}", highlight=False, soft_wrap=True)
    sys.exit(code)


def _print_json(obj) -> None:
    """``--json``: the result alone on standard output (messages go to standard error)."""
    sys.stdout.write(json_text(obj) + "\n")
    sys.stdout.flush()


def _write_file(path: Path, data: bytes | str, option: str) -> None:
    """Write ``data`` to ``path`` atomically, or fail with one line naming the option."""
    from sweepctl.campaign.store import atomic_write_bytes

    try:
        if path.parent and not path.parent.exists():
            path.parent.mkdir(parents=True, exist_ok=True)
        atomic_write_bytes(path, data.encode() if isinstance(data, str) else data)
    except OSError as exc:
        raise UserError(
            f"{option}: cannot write {str(path)!r} ({exc.strerror or exc}); choose a writable path"
        ) from None


def _check_writable_dir(directory: Path, option: str) -> None:
    """Fail now, with one line naming the option, if files cannot be created in ``directory``
    (before minutes of fitting are spent, not after)."""
    import tempfile

    try:
        directory.mkdir(parents=True, exist_ok=True)
        with tempfile.NamedTemporaryFile(dir=directory, prefix=".sweepctl-probe-"):
            pass
    except OSError as exc:
        raise UserError(
            f"{option}: cannot write in {str(directory)!r} ({exc.strerror or exc}); "
            "choose a writable path"
        ) from None


def _parse_widths(text: str) -> list[int]:
    try:
        widths = [int(w) for w in text.split(",") if w.strip()]
    except ValueError:
        raise UserError(
            f"--widths: {text!r} is not a comma-separated list of integers; "
            "write e.g. --widths 4,8,32"
        ) from None
    if not widths or any(w < 1 for w in widths):
        raise UserError(f"--widths: {text!r} must list widths >= 1, e.g. --widths 4,8,32")
    return widths


def _print_version(value: bool) -> None:
    if value:
        console.print(f"sweepctl {__version__}")
        raise typer.Exit(0)


@app.callback()
def _root(
    debug: Annotated[bool, typer.Option("--debug", help="Show tracebacks on errors.")] = False,
    version: Annotated[
        bool,
        typer.Option("--version", callback=_print_version, is_eager=True, help="Show version."),
    ] = False,
) -> None:
    _DEBUG["on"] = debug


@app.command()
def bench(
    widths: Annotated[
        str, typer.Option("--widths", help="Comma-separated strip widths N.")
    ] = "4,8,32,64",
    strips: Annotated[int, typer.Option("--strips", min=1, help="Strips per batch.")] = 8,
    seconds: Annotated[
        float, typer.Option("--seconds", min=0.05, help="Timed seconds per width.")
    ] = 1.0,
    out: Annotated[
        Path | None,
        typer.Option("--out", help="Write the calibration file (for --calibration) here."),
    ] = None,
    json_out: Annotated[
        bool, typer.Option("--json", help="Print the calibration as JSON instead of the table.")
    ] = False,
) -> None:
    """Measure kernel throughput per width on this machine (one BLAS thread)."""
    from sweepctl.bench import bench_widths, calibration_payload, zgemm_gflops

    ws = _parse_widths(widths)
    with err_console.status("compiling the kernel and measuring…"):
        rows = bench_widths(ws, strips=strips, seconds=seconds)
        gemm = zgemm_gflops()
    payload = calibration_payload(rows, gemm)
    if out is not None:
        _write_file(out, json_text(payload) + "\n", "--out")
    if json_out:
        _print_json(payload)
        if out is not None:
            err_console.print(f"wrote {out}")
        return
    table = Table(title=f"sweepctl bench — {strips} strips, one BLAS thread, x = 0")
    for col in (
        "N",
        "layers/s per strip",
        "strip-layers/s",
        "QR per layer",
        "GFLOP/s",
        "of zgemm",
        "strip-layers/s, p = 1/3",
        "column µs",
        "QR µs",
    ):
        table.add_column(col, justify="right")
    for r in rows:
        table.add_row(
            str(r.width),
            f"{r.layers_per_second:,.0f}",
            f"{r.strip_layers_per_second:,.0f}",
            f"{r.qr_per_layer:.3f}",
            f"{r.gflops:.2f}",
            f"{r.gflops / gemm:.0%}",
            f"{r.strip_layers_per_second_disorder:,.0f}",
            f"{1e6 * r.column_seconds:.2f}",
            f"{1e6 * r.qr_seconds:.2f}",
        )
    console.print(table)
    console.print(f"complex matrix multiply (zgemm 512, one thread): {gemm:.1f} GFLOP/s")
    console.print(
        "p = 1/3: p_block = p_open = 1/3, ε = 1e-6; of zgemm: GFLOP/s (nominal flops of the node "
        "updates and QRs) as a fraction of that zgemm rate; column µs: one layer without its "
        "QRs, per strip; QR µs: one QR of one strip's frame"
    )
    if out is not None:
        console.print(f"wrote {out}")


# ----------------------------------------------------------------------------- campaigns

StoreArg = Annotated[Path, typer.Argument(help="Campaign store directory.", metavar="STORE")]
#: the store after the recipe (run, plan, cluster submit): an argument like everywhere
#: else; ``--store`` stays accepted, hidden, for scripts written before
StoreAfterRecipe = Annotated[
    Path | None,
    typer.Argument(
        help="Campaign store directory (made by the first run).",
        show_default=False,
        metavar="STORE",
    ),
]
StoreOptionOld = Annotated[
    Path | None,
    typer.Option("--store", hidden=True, help="The store as an option (older spelling)."),
]


def _one_store(arg: Path | None, opt: Path | None, usage: str, required: bool = True):
    """The store given as the argument or the older ``--store`` option, not both."""
    if arg is not None and opt is not None and arg != opt:
        raise UserError(
            f"STORE = {str(arg)!r} and --store = {str(opt)!r}: give the store once, e.g. {usage}"
        )
    store = arg if arg is not None else opt
    if store is None and required:
        raise UserError(f"STORE: missing; give the campaign store directory, e.g. {usage}")
    return store


RecipeArg = Annotated[Path, typer.Argument(help="Recipe file (TOML).", metavar="RECIPE")]
CalibrationOpt = Annotated[
    Path | None,
    typer.Option("--calibration", help="Kernel calibration from `sweepctl bench --out FILE`."),
]


def _hours(h: float | None) -> str:
    if h is None or h != h:
        return "?"
    if h < 10 / 3600:
        return f"{h * 3600:.1f} s"
    if h < 1 / 60:
        return f"{h * 3600:.0f} s"
    if h < 1:
        return f"{h * 60:.1f} min"
    return f"{h:,.1f} h"


def _duration(seconds: float | None) -> str:
    if seconds is None:
        return "?"
    s = round(seconds)
    if s < 60:
        return f"{s}s"
    if s < 3600:
        return f"{s // 60}m{s % 60:02d}s"
    return f"{s // 3600}h{(s % 3600) // 60:02d}m"


@app.command()
def new(
    path: Annotated[
        Path, typer.Argument(help="Recipe file to create (never overwritten).", metavar="RECIPE")
    ],
    name: Annotated[
        str | None,
        typer.Option("--name", help="Campaign name (default: the file name without .toml)."),
    ] = None,
) -> None:
    """Write a commented template recipe with an entropy of its own."""
    from sweepctl.campaign.template import write_template

    out = write_template(path, name)
    console.print(
        f"wrote {out}: edit the axes and the precision, then `sweepctl plan {out}`",
        highlight=False,
    )


@app.command()
def plan(
    recipe: RecipeArg,
    store_arg: Annotated[
        Path | None,
        typer.Argument(
            help="A store: preview what `run` would do there (new and reopened points).",
            show_default=False,
            metavar="STORE",
        ),
    ] = None,
    json_out: Annotated[bool, typer.Option("--json", help="Print the plan as JSON.")] = False,
    calibration: CalibrationOpt = None,
    store_opt: StoreOptionOld = None,
) -> None:
    """Points, replicas, seeds and estimated cost of a recipe (nothing is run)."""
    from sweepctl.bench import cost_model
    from sweepctl.campaign.plan import make_plan

    store = _one_store(store_arg, store_opt, "sweepctl plan RECIPE STORE", required=False)
    rec = load_recipe_or_fail(recipe)
    with console.status("calibrating the kernel…") if not json_out else _null():
        cost, origin = cost_model(list(rec.widths), calibration)
    frozen = preview = None
    if store is not None:
        from sweepctl.campaign.plan_store import preview_on_store

        frozen, preview = preview_on_store(rec, store, str(recipe), cost)
    pl = make_plan(rec, cost, origin, frozen, source=str(recipe))
    if preview is not None:
        pl["store"] = {"path": str(store), **preview.to_json()}
    if rec.goal is not None:
        from sweepctl.campaign.plan import freeze
        from sweepctl.campaign.plan_store import goal_plan

        with console.status("projecting the goal…") if not json_out else _null():
            pl["goal"] = goal_plan(rec, frozen or freeze(rec, cost, None), store)
    if json_out:
        _print_json(pl)
        return
    t = Table(title=f"plan for {rec.name!r}: {pl['points']} points")
    for c in (
        "N",
        "p_block",
        "p_open",
        "ε",
        "points",
        "replica layers",
        "warm-up",
        "strips",
        "replicas/point",
        "cap",
        "CPU/replica",
        "CPU total",
    ):
        t.add_column(c, justify="right")
    for g in pl["widths"]:
        t.add_row(
            str(g["N"]),
            f"{g['p_block']:g}",
            f"{g['p_open']:g}",
            f"{g['epsilon']:g}",
            str(g["points"]),
            f"{g['replica_layers']:,}",
            str(g["warmup"]),
            str(g["strips"]),
            str(g["expected_replicas_per_point"]),
            str(g["max_replicas"]),
            _hours(g["cpu_hours_per_replica"]),
            _hours(g["cpu_hours"]),
        )
    console.print(t)
    console.print(
        f"total: {pl['replicas']:,} replicas, about {_hours(pl['cpu_hours'])} of CPU "
        f"({pl['cost_source']}); precision target {rec.target:g} relative on Γ"
    )
    console.print(f"seeds: {pl['seed_scheme']}")
    console.print(f"suggested: {pl['suggestion']}")
    if rec.goal is not None:
        _print_goal_plan(pl["goal"])
    if preview is not None:
        console.print(
            f"on {store}: {preview.stored_rows:,} replicas stored; a run would submit "
            f"{preview.replicas_to_submit:,} replicas for {preview.todo_points} points "
            f"({len(preview.new_points)} new, {len(preview.reopened_points)} reopened by "
            "the recipe's target or cap), before any further rounds"
        )


def _print_goal_plan(g: dict) -> None:
    console.print(
        f"goal: 95 % half-width of nu {g['nu_halfwidth']:g} per slice within "
        f"{_hours(g['cpu_hours'])} of CPU",
        highlight=False,
    )
    if g["pilot_cpu_hours"] is not None:
        console.print(
            f"  pilot round: {g['pilot_replicas']:,} replicas, {_hours(g['pilot_cpu_hours'])}",
            highlight=False,
        )
    if g["projected_cpu_hours"] is not None:
        console.print(
            f"  projected to the goal: about {_hours(g['projected_cpu_hours'])} in all "
            f"(linearised, from {g['basis']}; a refit can need more)",
            highlight=False,
        )
    for k, sl in (g.get("slices") or {}).items():
        if sl.get("nu") is None:
            continue
        hw = sl.get("halfwidth")
        pm = f" ± {hw:.4f}" if hw is not None else ""
        console.print(f"  {k}: nu = {sl['nu']:.4f}{pm} now ({sl['form']})", highlight=False)
    if g.get("note"):
        console.print(f"  {g['note']}", highlight=False)


class _null:
    def __enter__(self):
        return self

    def __exit__(self, *a):
        return False


def load_recipe_or_fail(path: Path):
    from sweepctl.campaign.recipe import load_recipe

    return load_recipe(path)


class _RunDisplay:
    """Progress bar with ETA on a terminal; a plain line every 30 s otherwise."""

    def __init__(self, out: Console | None = None) -> None:
        self.out = out or console
        self.tty = self.out.is_terminal
        self.progress = None
        self.task = None
        self.last_line = 0.0
        self.msg: dict = {}

    def __call__(self, msg: dict) -> None:
        import time

        kind = msg["kind"]
        if kind == "start":
            console.print(
                f"{msg['points']} points, {msg['todo']} to do, "
                f"{msg['stored_rows']} replicas already stored"
            )
            if self.tty and msg["todo"]:
                from rich.progress import BarColumn, Progress, TextColumn

                self.progress = Progress(
                    TextColumn("replicas"),
                    BarColumn(),
                    TextColumn("{task.completed}/{task.total}"),
                    TextColumn("ETA {task.fields[eta]}"),
                    console=console,
                    transient=False,
                )
                self.progress.start()
                self.task = self.progress.add_task("run", total=1, eta="?")
        elif kind == "progress":
            self.msg = msg
            if self.progress is not None:
                self.progress.update(
                    self.task,
                    completed=msg["done"],
                    total=max(1, msg["total"]),
                    eta=_duration(msg["eta"]),
                )
            elif time.monotonic() - self.last_line >= 30.0:
                self.last_line = time.monotonic()
                self._plain()
        elif kind == "log":
            (self.progress.console if self.progress else console).print(msg["message"])

    def _plain(self) -> None:
        import time

        m = self.msg
        if not m:
            return
        pct = 100.0 * m["done"] / max(1, m["total"])
        console.print(
            f"{time.strftime('%H:%M:%S')} replicas {m['done']}/{m['total']} ({pct:.0f}%), "
            f"computed this run {m['computed']}, ETA {_duration(m['eta'])}",
            highlight=False,
        )

    def close(self) -> None:
        if self.progress is not None:
            self.progress.stop()
        elif self.msg:
            self._plain()


DashboardOpt = Annotated[
    str | None,
    typer.Option(
        "--dashboard",
        help="Serve the Dask dashboard on PORT or HOST:PORT (default host 127.0.0.1; "
        "'on' picks a free port); its address is printed.",
    ),
]
SchedulerOpt = Annotated[
    str | None, typer.Option("--scheduler", help="Address of a running Dask scheduler.")
]
SchedulerFileOpt = Annotated[
    Path | None, typer.Option("--scheduler-file", help="Dask scheduler file.")
]


@app.command()
def run(
    recipe: RecipeArg,
    store_arg: StoreAfterRecipe = None,
    store_opt: StoreOptionOld = None,
    workers: Annotated[
        int | None,
        typer.Option("--workers", min=1, help="Local worker processes (default: cores)."),
    ] = None,
    scheduler: SchedulerOpt = None,
    scheduler_file: SchedulerFileOpt = None,
    calibration: CalibrationOpt = None,
    cluster: Annotated[
        str | None, typer.Option("--cluster", help="Batch profile (or slurm/pbs/sge/lsf).")
    ] = None,
    profiles: Annotated[
        Path | None, typer.Option("--profiles", help="Profile file (default: user config).")
    ] = None,
    walltime: Annotated[
        str | None, typer.Option("--walltime", help="Job walltime HH:MM:SS.")
    ] = None,
    queue: Annotated[str | None, typer.Option("--queue", help="Partition / queue.")] = None,
    min_jobs: Annotated[
        int | None,
        typer.Option("--min-jobs", min=0, help="Fewest worker jobs kept (adaptive scaling)."),
    ] = None,
    max_jobs: Annotated[
        int | None,
        typer.Option("--max-jobs", min=1, help="Most worker jobs at once (adaptive scaling)."),
    ] = None,
    lease_expiry: Annotated[
        str | None,
        typer.Option(
            "--lease-expiry",
            help="How long the store's lease lasts without a heartbeat before a driver on "
            "any host may take over (default 10m; e.g. 90s, 5m).",
        ),
    ] = None,
    lease_wait: Annotated[
        str | None,
        typer.Option(
            "--lease-wait", help="Wait this long for another driver's lease to end or expire."
        ),
    ] = None,
    dashboard: DashboardOpt = None,
    compact_at: Annotated[
        int,
        typer.Option(
            "--compact-at",
            min=2,
            help="Compact the store's part files once this many small ones exist.",
        ),
    ] = 64,
    flush_seconds: Annotated[
        float,
        typer.Option(
            "--flush-seconds",
            min=0.0,
            help="Store arrived replicas (and log their events) at least this often; "
            "0 stores each one as it arrives.",
        ),
    ] = 5.0,
) -> None:
    """Run or continue a campaign until every point reaches its precision (or cap)."""
    from sweepctl.bench import cost_model
    from sweepctl.campaign.connect import RunOptions
    from sweepctl.campaign.driver import run_campaign
    from sweepctl.campaign.store import Store

    store = _one_store(store_arg, store_opt, "sweepctl run RECIPE STORE")
    ways = (
        ("--scheduler", scheduler),
        ("--scheduler-file", scheduler_file),
        ("--cluster", cluster),
        ("--workers", workers),
    )
    chosen = [o for o, v in ways if v]
    if len(chosen) > 1:
        raise UserError(f"{' and '.join(chosen)}: give one way to get workers, not several")
    rec = load_recipe_or_fail(recipe)
    st = Store(store)
    opts = RunOptions(
        workers=workers,
        scheduler=scheduler,
        scheduler_file=str(scheduler_file) if scheduler_file else None,
        lease_expiry=_seconds(lease_expiry, "--lease-expiry"),
        lease_wait=_seconds(lease_wait, "--lease-wait") or 0.0,
        dashboard=_dashboard(dashboard),
        compact_at=compact_at,
        flush_seconds=flush_seconds,
    )
    if cluster:
        from sweepctl.cluster import load_profile, make_cluster

        over = {"walltime": walltime, "queue": queue, "min_jobs": min_jobs, "max_jobs": max_jobs}
        prof = load_profile(cluster, profiles, over)
        opts.cluster_factory = lambda: make_cluster(prof, st.root, opts.dashboard)
        opts.default_replica_seconds = prof.replica_seconds()
    elif _wants_tls(scheduler, scheduler_file):
        from sweepctl.cluster import make_security

        st.root.mkdir(parents=True, exist_ok=True)
        opts.security = make_security(st.root)
    needs = rec.replica_layers is None or rec.max_cpu_hours is not None or rec.model is not None
    cost, _ = cost_model(list(rec.widths), calibration, measure=needs)
    display = _RunDisplay()
    try:
        res = run_campaign(rec, st, str(recipe), opts, cost, display)
    finally:
        display.close()
    console.print(
        f"{res.done} of {res.points} points done ({res.capped} stopped at the cap), "
        f"{res.failed} failed; {res.computed} replicas computed in {_duration(res.seconds)}"
    )
    if res.goal_reason is not None:
        console.print(f"goal on nu: {res.goal_reason}")
    if res.interrupted:
        console.print(
            f"interrupted — run the same command again to continue: sweepctl run {recipe} {store}"
        )
        raise typer.Exit(130)
    if res.failed:
        raise typer.Exit(1)


def _seconds(text: str | None, option: str) -> float | None:
    from sweepctl.cluster import parse_duration

    if text is None:
        return None
    secs = parse_duration(text, option)
    if option == "--lease-expiry" and secs < 1:
        raise UserError(f"{option} = {text!r}: must be at least 1s, e.g. {option} 10m")
    return float(secs)


def _dashboard(text: str | None) -> str | None:
    """``--dashboard`` without a value, or with a port or host:port (loopback unless a
    host is given)."""
    if text is None:
        return None
    t = text.strip()
    if t in ("", "on", "auto"):
        return "127.0.0.1:0"
    if t.isdigit():
        return f"127.0.0.1:{t}"
    host, _, port = t.rpartition(":")
    if not host or not port.isdigit():
        raise UserError(f"--dashboard = {text!r}: give a port (8787) or HOST:PORT (127.0.0.1:8787)")
    return t


def _wants_tls(scheduler: str | None, scheduler_file: Path | None) -> bool:
    if scheduler:
        return scheduler.startswith("tls://")
    if scheduler_file and scheduler_file.exists():
        with contextlib.suppress(OSError, ValueError):
            return str(json.loads(scheduler_file.read_text()).get("address", "")).startswith("tls")
    return False


cluster_app = typer.Typer(help="Batch-system profiles and job scripts.", no_args_is_help=True)
app.add_typer(cluster_app, name="cluster")


@cluster_app.command("script")
def cluster_script(
    profile: Annotated[
        str, typer.Argument(help="Profile name (or slurm/pbs/sge/lsf).", metavar="PROFILE")
    ],
    profiles: Annotated[Path | None, typer.Option("--profiles", help="Profile file.")] = None,
    walltime: Annotated[
        str | None,
        typer.Option("--walltime", help="Job walltime HH:MM:SS (wins over the profile)."),
    ] = None,
    queue: Annotated[
        str | None, typer.Option("--queue", help="Partition / queue (wins over the profile).")
    ] = None,
) -> None:
    """Print the job script a worker job of PROFILE would submit."""
    from sweepctl.cluster import job_script, load_profile

    p = load_profile(profile, profiles, {"walltime": walltime, "queue": queue})
    print(job_script(p))


@cluster_app.command("list")
def cluster_list(
    profiles: Annotated[Path | None, typer.Option("--profiles", help="Profile file.")] = None,
) -> None:
    """List the batch profiles (the user's file, then the bare system names)."""
    from sweepctl.cluster.batch import list_profiles

    path, rows = list_profiles(profiles)
    t = Table(title=f"profiles ({path or 'no profile file; packaged defaults only'})")
    for c in ("name", "system", "walltime", "cores", "max jobs", "from"):
        t.add_column(c)
    for r in rows:
        t.add_row(r.name, r.system, r.walltime, str(r.cores), str(r.max_jobs), r.source)
    console.print(t)


@cluster_app.command("show")
def cluster_show(
    name: Annotated[
        str, typer.Argument(help="Profile name (or slurm/pbs/sge/lsf).", metavar="PROFILE")
    ],
    profiles: Annotated[Path | None, typer.Option("--profiles", help="Profile file.")] = None,
) -> None:
    """Print a profile's resolved settings (packaged defaults < file < command line)."""
    from sweepctl.cluster.batch import describe_profile, load_profile

    for key, value in describe_profile(load_profile(name, profiles)):
        console.print(f"{key:<18} {value}", highlight=False, soft_wrap=True)


@cluster_app.command("submit")
def cluster_submit(
    recipe: RecipeArg,
    store_arg: StoreAfterRecipe = None,
    store_opt: StoreOptionOld = None,
    cluster: Annotated[str, typer.Option("--cluster", help="Batch profile (or slurm/pbs/…).")] = "",
    profiles: Annotated[Path | None, typer.Option("--profiles", help="Profile file.")] = None,
    walltime: Annotated[str | None, typer.Option("--walltime", help="Per allocation.")] = None,
    queue: Annotated[
        str | None, typer.Option("--queue", help="Partition / queue (wins over the profile).")
    ] = None,
    stop_margin: Annotated[
        str | None,
        typer.Option("--stop-margin", help="Stop this long before the walltime (default 5m)."),
    ] = None,
    lease_expiry: Annotated[
        str | None,
        typer.Option(
            "--lease-expiry",
            help="Lease expiry of each link's driver (default 10m; e.g. 90s, 5m).",
        ),
    ] = None,
    dashboard: DashboardOpt = None,
) -> None:
    """Submit a self-continuing campaign: each allocation runs scheduler, workers and
    driver, stops shortly before its walltime and submits its successor, until done."""
    from sweepctl.cluster import load_profile
    from sweepctl.cluster.chain import submit_chain

    store = _one_store(store_arg, store_opt, "sweepctl cluster submit RECIPE STORE --cluster NAME")
    if not cluster:
        raise UserError(
            "--cluster: missing; name a batch profile, e.g. --cluster slurm-standard "
            "(see sweepctl cluster list)"
        )
    rec = load_recipe_or_fail(recipe)
    _check_against_store(rec, store, recipe)
    prof = load_profile(cluster, profiles, {"walltime": walltime, "queue": queue})
    jid = submit_chain(
        recipe,
        store,
        prof,
        stop_margin,
        _seconds(lease_expiry, "--lease-expiry"),
        dashboard=_dashboard(dashboard),
    )
    console.print(
        f"submitted job {jid} ({prof.system}, walltime {prof.walltime}); the campaign now "
        f"continues itself until complete.\n  watch: sweepctl status {store}\n  stop:  "
        f"sweepctl cluster stop {store}",
        highlight=False,
        soft_wrap=True,
    )


def _check_against_store(rec, store: Path, source: Path) -> None:
    """Refuse a recipe change the store would refuse, before anything is queued."""
    from sweepctl.campaign.plan import Frozen, check_compatible
    from sweepctl.campaign.store import Store

    st = Store(store)
    if st.exists():
        check_compatible(rec, Frozen.from_json(st.read_campaign()["frozen"]), str(source))


@cluster_app.command("stop")
def cluster_stop(
    store: StoreArg,
    let_finish: Annotated[
        bool,
        typer.Option(
            "--let-finish", help="Let the running link work until its stop margin, then end."
        ),
    ] = False,
) -> None:
    """Stop a self-continuing campaign: no link continues it; queued and running links
    are cancelled (the running driver stores what it has first)."""
    from sweepctl.cluster.chain import stop_chain

    res = stop_chain(store, cancel=not let_finish)
    jobs = ", ".join(res["cancelled"]) or "none"
    console.print(
        f"stopped: no link will continue the campaign; cancelled jobs: {jobs}. "
        f"Continue later with `sweepctl cluster submit RECIPE {store} --cluster NAME`.",
        highlight=False,
        soft_wrap=True,
    )


@cluster_app.command("link", hidden=True)
def cluster_link(
    store_arg: Annotated[
        Path | None,
        typer.Argument(help="Campaign store directory.", show_default=False, metavar="STORE"),
    ] = None,
    store_opt: StoreOptionOld = None,
    calibration: CalibrationOpt = None,
) -> None:
    """One link of a self-continuing campaign (run by the job script)."""
    from sweepctl.bench import cost_model
    from sweepctl.campaign.recipe import load_recipe
    from sweepctl.cluster.chain import chain_dir, run_link

    store = _one_store(store_arg, store_opt, "sweepctl cluster link STORE")
    rec = load_recipe(chain_dir(store) / "recipe.toml")
    needs = rec.replica_layers is None or rec.max_cpu_hours is not None
    cost, _ = cost_model(list(rec.widths), calibration, measure=needs)
    display = _RunDisplay()
    try:
        outcome, code = run_link(store, cost, display)
    finally:
        display.close()
    console.print(f"link ended: {outcome}")
    raise typer.Exit(code)


@app.command()
def merge(
    store: StoreArg,
    out: Annotated[
        Path | None, typer.Option("--out", help="Output directory (default STORE/merged).")
    ] = None,
    json_out: Annotated[
        bool, typer.Option("--json", help="Print what was written as JSON.")
    ] = False,
) -> None:
    """Write the per-point table (Parquet and CSV)."""
    import io

    from sweepctl.campaign.store import Store
    from sweepctl.campaign.summary import merge_table

    st = Store(store)
    df = merge_table(st)
    target = out or st.merged_dir
    buf = io.BytesIO()
    df.to_parquet(buf, index=False)
    _write_file(target / "points.parquet", buf.getvalue(), "--out")
    _write_file(target / "points.csv", df.to_csv(index=False), "--out")
    reached = int(df["reached_target"].sum()) if len(df) else 0
    if json_out:
        _print_json(
            {
                "points": len(df),
                "at_target": reached,
                "replicas": int(df["replicas"].sum()) if "replicas" in df and len(df) else 0,
                "parquet": str(target / "points.parquet"),
                "csv": str(target / "points.csv"),
            }
        )
        return
    console.print(
        f"{len(df)} points ({reached} at target) -> {target / 'points.parquet'}, "
        f"{target / 'points.csv'}"
    )


@app.command()
def status(
    store: StoreArg,
    json_out: Annotated[bool, typer.Option("--json", help="Print JSON.")] = False,
    calibration: CalibrationOpt = None,
) -> None:
    """Per-point progress, precision reached and remaining cost."""
    from sweepctl.bench import cost_model
    from sweepctl.campaign.store import Store
    from sweepctl.campaign.summary import status_rows
    from sweepctl.cluster.chain import chain_summary

    st = Store(store)
    chain = chain_summary(st.root)
    if chain is not None and not st.exists():  # submitted; no link has started the store
        _print_chain(chain)
        return
    st.require()
    cost, _ = cost_model([4], calibration, measure=False)
    rows, totals = status_rows(st, cost)
    if json_out:
        totals["allocations"] = chain
        _print_json({"totals": totals, "points": rows})
        return
    t = Table(title=f"{totals['campaign']}: {totals['done']}/{totals['points']} points done")
    for c in ("N", "x", "p_block", "p_open", "ε", "replicas", "Γ", "rel. err", "state", "left"):
        t.add_column(c, justify="right")
    shown = rows if len(rows) <= 200 else [r for r in rows if r["state"] != "done"][:200]
    for r in shown:
        t.add_row(
            str(r["N"]),
            f"{r['x']:g}",
            f"{r['p_block']:g}",
            f"{r['p_open']:g}",
            f"{r['epsilon']:g}",
            f"{r['replicas']}/{r['planned']}",
            "—" if r["Gamma"] != r["Gamma"] else f"{r['Gamma']:.4f}",
            "—" if r["rel_err"] == float("inf") else f"{r['rel_err']:.2%}",
            r["state"],
            _hours(r["remaining_cpu_hours"]),
        )
    console.print(t)
    if len(shown) < len(rows):
        console.print(f"({len(rows) - len(shown)} more points not shown; use --json)")
    console.print(
        f"done {totals['done']}, capped {totals['capped']}, running {totals['running']}, "
        f"partial {totals['partial']}, pending {totals['pending']}; {totals['replicas']} "
        f"replicas stored; remaining {_hours(totals['remaining_cpu_hours'])} CPU for the "
        "current rounds",
        highlight=False,
    )
    for line in _status_lines(totals):
        console.print(line, highlight=False, soft_wrap=True)
    if "goal" in totals:
        console.print(_goal_line(totals["goal"]), highlight=False, soft_wrap=True)
    if chain is not None:
        _print_chain(chain)


def _goal_line(goal: dict) -> str:
    """``status``: the goal on ν, each slice's ν ± half-width, and why the campaign stopped."""
    head = f"goal: nu ± {goal['nu_halfwidth']:g} per slice within {goal['cpu_hours']:g} CPU-hours"
    if goal.get("note"):
        return f"{head} ({goal['note']})"
    parts = []
    for k, v in goal["slices"].items():
        if v["nu"] is None:
            parts.append(f"{k}: no acceptable form yet")
            continue
        hw = v.get("halfwidth")
        text = f"{k}: nu = {v['nu']:.4g}" + (f" ± {hw:.3g}" if hw is not None else "")
        c = v.get("check")
        if c is not None and c["nu_ci"][0] is not None:
            text += f" (sweepctl fit: [{c['nu_ci'][0]:.4g}, {c['nu_ci'][1]:.4g}])"
        parts.append(text)
    spent = goal["cpu_hours_spent"]
    tail = f"; {spent:.3g} CPU-hours spent" if spent is not None else ""
    proj = goal.get("projected_cpu_hours")
    if proj is not None and not goal["reason"]:
        tail += f", about {proj:.3g} projected to the goal (linearised)"
    state = f"stopped: {goal['reason']}" if goal["reason"] else f"round {goal['round']}"
    return f"{head}; {state}{tail}" + ("; " + "; ".join(parts) if parts else "")


def _print_chain(chain: dict) -> None:
    last = chain["last"]
    what = last.get("outcome") or last.get("event")
    extra = f", successor {last['successor']}" if last.get("successor") else ""
    stop = "; stop requested" if chain["stop_requested"] else ""
    console.print(
        f"allocations: {chain['links']} links so far; last: job {last.get('job', '—')} "
        f"{what}{extra} at {last.get('time')}{stop} (STORE/allocations/links.jsonl)",
        highlight=False,
        soft_wrap=True,
    )


def _status_lines(totals: dict) -> list[str]:
    d = totals["driver"]
    who = f"pid {d.get('pid')} on {d.get('host')}"
    if d["state"] == "running":
        drv = (
            f"driver: running, {who}, last heartbeat {d['last_heartbeat']} (lease expires in "
            f"{d['expires_in_seconds']:.0f} s unless renewed)"
        )
    elif d["state"] == "stopped":
        drv = f"driver: none (the last one, {who}, stopped at {d['last_heartbeat']})"
    elif d["state"] == "lost":
        drv = (
            f"driver: none — the last one, {who}, stopped renewing its lease at "
            f"{d['last_heartbeat']} without a clean-up; the next run takes over"
        )
    else:
        drv = "driver: none has run yet"
    lines = [drv]
    ev = totals.get("last_event")
    if ev:
        what = ev.get("event")
        extra = f" (point {ev['point']}, replica {ev['replica']})" if "replica" in ev else ""
        lines.append(f"last event: {what}{extra} at {ev.get('time')}")
    eta = totals.get("eta_seconds")
    if totals["done"] + totals["capped"] < totals["points"]:
        if eta is None:
            lines.append(f"ETA: unknown ({totals.get('throughput_basis')})")
        else:
            cond = "" if d["state"] == "running" else ", once a driver runs again"
            lines.append(
                f"ETA: {_duration(eta)} of wall clock for the current rounds at the "
                f"throughput observed over {totals['throughput_basis']}{cond}"
            )
    return lines


@app.command()
def compact(
    store: StoreArg,
    lease_wait: Annotated[
        str | None,
        typer.Option("--lease-wait", help="Wait this long for a running driver's lease."),
    ] = None,
) -> None:
    """Merge the store's small part files into large ones; remove orphaned checkpoints.

    Takes the store's lease (never alongside a driver); safe to kill at any moment.
    """
    from sweepctl.campaign.store import Store
    from sweepctl.campaign.summary import compact_store

    st = Store(store)
    st.require()
    res = compact_store(st, wait=_seconds(lease_wait, "--lease-wait") or 0.0)
    console.print(
        f"{res['files_before']} part files -> {res['files_after']} "
        f"({res['files_read']} small ones merged into {res['files_written']}); "
        f"{res['removed_checkpoints']} checkpoints of stored replicas removed",
        highlight=False,
        soft_wrap=True,
    )


@app.command()
def audit(
    store: StoreArg,
    point: Annotated[
        str | None, typer.Option("--point", help="Seed trace of e.g. N=8,x=0.1,p=0.1.")
    ] = None,
    recompute_n: Annotated[
        int, typer.Option("--recompute", min=0, help="Recompute K random replicas bitwise.")
    ] = 0,
    seed: Annotated[
        int | None, typer.Option("--seed", help="Seed for choosing the replicas.")
    ] = None,
    json_out: Annotated[
        bool, typer.Option("--json", help="Print the audit as JSON (exit status unchanged).")
    ] = False,
) -> None:
    """Check integrity, trace seeds, recompute replicas; exit 1 on any problem."""
    from sweepctl.campaign.audit import audit_store, parse_selector, recompute, seed_trace
    from sweepctl.campaign.store import Store

    st = Store(store)
    st.require()
    sel = parse_selector(point) if point else None
    rep = audit_store(st)
    if json_out:
        doc = {
            "ok": None,
            "files": rep.files,
            "rows": rep.rows,
            "problems": list(rep.problems),
            "warnings": list(rep.warnings),
        }
        if rep.allocation is not None:
            doc["allocation"] = rep.allocation
        if sel is not None:
            doc["seed_trace"] = seed_trace(st, sel)
        if recompute_n:
            rep.recomputed = recompute(st, recompute_n, seed, sel)
            doc["recomputed"] = rep.recomputed
        doc["ok"] = bool(rep.ok)
        _print_json(doc)
        if not rep.ok:
            raise typer.Exit(1)
        return
    console.print(
        f"integrity: {rep.files} files, {rep.rows} replica rows, {len(rep.problems)} problem(s)"
    )
    if rep.allocation is not None:
        a = rep.allocation
        console.print(
            f"allocation: {a['rounds_replayed']} round(s) replayed from the stored rows, "
            f"{a['rounds_logged']} logged, {a['mismatches']} mismatch(es)",
            highlight=False,
        )
    for p in rep.problems:
        console.print(f"  problem: {p}", highlight=False)
    for w in rep.warnings:
        console.print(f"  warning: {w}", highlight=False)
    if sel is not None:
        trace = seed_trace(st, sel)
        t = Table(title=f"seed trace for {point}: {len(trace)} replicas")
        for c in ("point", "r", "spawn key", "layers", "Γ", "worker", "host", "job", "code"):
            t.add_column(c)
        for r in trace:
            t.add_row(
                r["point_key"],
                str(r["replica"]),
                ",".join(map(str, r["spawn_key"])),
                str(r["layers"]),
                f"{r['Gamma']:.6f}",
                str(r["worker"]),
                str(r["host"]),
                str(r["batch_job_id"] or "—"),
                f"{r['sweepctl_version']} {str(r['git_commit'])[:12]}",
            )
        console.print(t)
        if trace:
            console.print(
                f"entropy {trace[0]['entropy']}; seed of replica r = "
                "SeedSequence(entropy, spawn_key), PCG64"
            )
    if recompute_n:
        with console.status(f"recomputing {recompute_n} replicas…"):
            rep.recomputed = recompute(st, recompute_n, seed, sel)
        for r in rep.recomputed:
            what = f"{r['point_key']} replica {r['replica']}"
            if r["verdict"] == "bit-identical":
                line = f"  bit-identical: {what}"
            elif r["verdict"] == "last-bits":
                line = (
                    f"  differs in the last bits (other build or CPU): {what}, max relative "
                    f"difference {r['max_rel_diff']:.1e} (stored by {r['stored_code']}; "
                    f"here {r['current_code']})"
                )
            else:
                line = (
                    f"  MISMATCH: {what}: max relative difference {r['max_rel_diff']:.1e} "
                    f"(stored Γ {r['stored_Gamma']:.12g}, recomputed "
                    f"{r['recomputed_Gamma']:.12g}"
                    + ("" if r["same_build"] else f"; stored by {r['stored_code']}")
                    + ")"
                )
            console.print(line, highlight=False)
    if not rep.ok:
        console.print("audit FAILED")
        raise typer.Exit(1)
    console.print("audit passed")


class _StepDisplay:
    """A bar per stage on a terminal; a plain line every 10 s (and at the end) otherwise."""

    def __init__(self, out: Console | None = None) -> None:
        self.out = out or console
        self.tty = self.out.is_terminal
        self.progress = None
        self.tasks: dict[str, object] = {}
        self.last = 0.0

    def __call__(self, stage: str, done: int, total: int) -> None:
        import time

        if self.tty:
            if self.progress is None:
                from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

                self.progress = Progress(
                    TextColumn("{task.description}"),
                    BarColumn(),
                    TextColumn("{task.completed}/{task.total}"),
                    TimeRemainingColumn(),
                    console=self.out,
                    transient=True,
                )
                self.progress.start()
            if stage not in self.tasks:
                self.tasks[stage] = self.progress.add_task(stage, total=total)
            self.progress.update(self.tasks[stage], completed=done, total=total)
        elif done == total or time.monotonic() - self.last >= 10.0:
            self.last = time.monotonic()
            self.out.print(f"{time.strftime('%H:%M:%S')} {stage} {done}/{total}", highlight=False)

    def close(self) -> None:
        if self.progress is not None:
            self.progress.stop()
            self.progress = None


def _orders(text: str, option: str):
    from sweepctl.fss.model import Orders

    try:
        return Orders.parse(text)
    except ValueError as exc:
        raise UserError(f"{option}: {exc}") from None


def _disorder(text: str | None):
    if text is None:
        return None
    try:
        pb, po = (float(v) for v in text.split(","))
    except ValueError:
        raise UserError(
            f"--disorder: {text!r} is not P_BLOCK,P_OPEN; write e.g. --disorder 0.1,0.1"
        ) from None
    return pb, po


MaxOrdersOpt = Annotated[str, typer.Option("--max-orders", help="Largest orders of the scan.")]
FitWorkersOpt = Annotated[
    int | None,
    typer.Option(
        "--workers",
        min=0,
        help="Resampling: 0 in this process, N local Dask workers (default: in this "
        "process unless the work is large).",
    ),
]
ResamplesOpt = Annotated[
    int, typer.Option("--resamples", min=20, help="Resampled refits for the intervals.")
]
FitSeedOpt = Annotated[int, typer.Option("--seed", min=0, help="Seed of the resampling.")]


def _fit_request(orders, n_min, symmetric, correction, disorder, epsilon, resamples, seed):
    from sweepctl.analysis import FitRequest

    if correction not in ("power", "log"):
        raise UserError(f"--correction: {correction!r} is not power or log; choose one")
    return FitRequest(
        orders=None if orders is None else _orders(orders, "--orders"),
        n_min=n_min,
        symmetric=symmetric,
        correction=correction,
        disorder=_disorder(disorder),
        epsilon=epsilon,
        resamples=resamples,
        seed=seed,
    )


def _print_epsilon_check(df) -> None:
    """With several ε values: per width, is Γ flat in ε, and which range to use."""
    from sweepctl.fss.regularisation import describe_range, epsilon_check

    rows, ranges = epsilon_check(df)
    if not rows:
        return
    t = Table(title="regularisation: is Γ flat in ε? (χ² about the weighted mean, per width)")
    for c in ("p_block", "p_open", "N", "ε values", "χ²", "dof", "p", "flat"):
        t.add_column(c)
    for r in rows:
        t.add_row(
            f"{r.p_block:g}",
            f"{r.p_open:g}",
            str(r.N),
            ", ".join(f"{e:g}" for e in r.epsilons),
            f"{r.chi2:.2f}",
            str(r.dof),
            f"{r.p_value:.3f}",
            "yes" if r.flat else "no",
        )
    console.print(t)
    for (pb, po), (lo, hi) in ranges.items():
        console.print(describe_range(pb, po, lo, hi), highlight=False)


#: exit status of ``fit`` when no form is acceptable (1: audit failed, 2: bad input)
EXIT_NO_ACCEPTABLE_FORM = 3


def _rich_table(title: str, head: list[str], rows: list[list[str]]) -> Table:
    t = Table(title=title)
    for c in head:
        t.add_column(c)
    for r in rows:
        t.add_row(*r)
    return t


@app.command("fit")
def fit_cmd(
    source: Annotated[
        Path, typer.Argument(help="A store, or a points table (CSV/Parquet).", metavar="SOURCE")
    ],
    orders: Annotated[
        str | None,
        typer.Option(
            "--orders",
            help="Fit only this form n_R,n_I,m_R,m_I (default: scan every form up to "
            "--max-orders and every N_min, take the stable choice).",
        ),
    ] = None,
    n_min: Annotated[
        int | None,
        typer.Option("--n-min", help="Smallest width used (default: all; the scan tries each)."),
    ] = None,
    symmetric: Annotated[
        bool | None,
        typer.Option(
            "--symmetric/--general",
            help="Duality-symmetric form (x_c = 0); default when p_block = p_open.",
        ),
    ] = None,
    correction: Annotated[
        str,
        typer.Option(
            "--correction", help="With --orders: irrelevant field power (N^y) or log (1/ln N)."
        ),
    ] = "power",
    disorder: Annotated[
        str | None, typer.Option("--disorder", help="Slice P_BLOCK,P_OPEN of the table.")
    ] = None,
    epsilon: Annotated[float | None, typer.Option("--epsilon", help="Slice ε.")] = None,
    resamples: ResamplesOpt = 1000,
    seed: FitSeedOpt = 0,
    json_out: Annotated[
        bool, typer.Option("--json", help="Print the fit as JSON instead of the tables.")
    ] = False,
    out: Annotated[
        Path | None, typer.Option("--out", help="Also write the fit as JSON to this file.")
    ] = None,
    scan_: Annotated[
        bool, typer.Option("--scan", help="Also print every form and N_min window tried.")
    ] = False,
    max_orders: MaxOrdersOpt = "4,1,3,1",
    workers: FitWorkersOpt = None,
    scheduler: SchedulerOpt = None,
    scheduler_file: SchedulerFileOpt = None,
) -> None:
    """Finite-size-scaling fit of Γ(x, N): ν, y, x_c, Γ_c with 95 % intervals.

    Exit status 0 with a result, 2 for bad input, 3 when no form is acceptable (then no
    ν or Γ_c is printed, and the attempts are listed).
    """
    from sweepctl import analysis
    from sweepctl import report as rp

    req = _fit_request(orders, n_min, symmetric, correction, disorder, epsilon, resamples, seed)
    req.max_orders = _orders(max_orders, "--max-orders")
    if out is not None:
        if out.is_dir():
            raise UserError(f"--out: {str(out)!r} is a directory; give a file name, e.g. fit.json")
        _check_writable_dir(out.parent, "--out")
    df = analysis.load(source)
    if not json_out:
        _print_epsilon_check(df)
    show = _StepDisplay(err_console if json_out else None)
    try:
        with analysis.resampling_mapper(
            workers, scheduler, str(scheduler_file) if scheduler_file else None, progress=show
        ) as mapper:
            sl, o = analysis.fit_source(df, req, mapper=mapper, progress=show)
    finally:
        show.close()
    summary = rp.outcome_summary(o)
    if out is not None:
        _write_file(out, json_text(summary) + "\n", "--out")
    if json_out:
        _print_json(summary)
        if out is not None:
            err_console.print(f"wrote {out}")
        if not o.acceptable:
            raise typer.Exit(EXIT_NO_ACCEPTABLE_FORM)
        return
    if scan_ or not o.acceptable:
        console.print(
            _rich_table(
                f"forms tried — {sl.label()}; ν interval linearised (±1.96σ)",
                rp.ATTEMPT_HEAD,
                rp.attempt_rows(o.rows, o.choice),
            )
        )
    if o.effective:
        console.print(
            _rich_table(
                "effective exponent from adjacent widths (no scaling form assumed)",
                rp.EFFECTIVE_HEAD,
                rp.effective_rows(o),
            )
        )
    if o.acceptable:
        console.print(_rich_table(f"fit — {sl.label()}", rp.HEADLINE_HEAD, rp.headline_rows(o)))
        console.print(
            _rich_table("branches (acceptable minima)", rp.BRANCH_HEAD, rp.branch_rows(o))
        )
        if o.sensitivity_reason and o.sensitivity_fits():
            console.print(
                _rich_table(
                    "acceptable fits with y fixed",
                    rp.ATTEMPT_HEAD,
                    rp.attempt_rows([r for r in o.sensitivity if r.acceptable]),
                )
            )
    for line in rp.words(o):
        console.print(line, highlight=False)
    if o.acceptable and o.best.at_bound:
        console.print(
            f"warning: {', '.join(o.best.at_bound)} ended on the bound of the search — the data "
            "do not determine it; add widths or drop the irrelevant field (n_I = 0)"
        )
    if out is not None:
        console.print(f"wrote {out}")
    if not o.acceptable:
        raise typer.Exit(EXIT_NO_ACCEPTABLE_FORM)


@app.command("report")
def report_cmd(
    store: Annotated[Path, typer.Argument(help="Campaign store directory.", metavar="STORE")],
    out: Annotated[Path, typer.Option("--out", help="Directory for the report files.")],
    orders: Annotated[
        str | None,
        typer.Option(
            "--orders",
            help="Orders n_R,n_I,m_R,m_I for every slice (default: the scan's stable choice).",
        ),
    ] = None,
    n_min: Annotated[int | None, typer.Option("--n-min", help="Smallest width used.")] = None,
    correction: Annotated[str, typer.Option("--correction", help="power or log.")] = "power",
    resamples: ResamplesOpt = 1000,
    seed: FitSeedOpt = 0,
    max_orders: MaxOrdersOpt = "4,1,3,1",
    workers: FitWorkersOpt = None,
    scheduler: SchedulerOpt = None,
    scheduler_file: SchedulerFileOpt = None,
) -> None:
    """Fits, plots (PNG and PDF) and a Markdown/HTML summary with the provenance.

    Exit status 0 when the report is written, also when a slice has no acceptable form
    (its section then says "no acceptable form" and lists the attempts); 2 for bad input.
    """
    from sweepctl import analysis

    req = _fit_request(orders, n_min, None, correction, None, None, resamples, seed)
    req.max_orders = _orders(max_orders, "--max-orders")
    if not (store / "campaign.json").exists():
        raise UserError(f"{store}: not a store (no campaign.json); give a run's store directory")
    _check_writable_dir(out, "--out")
    show = _StepDisplay()
    try:
        with analysis.resampling_mapper(
            workers, scheduler, str(scheduler_file) if scheduler_file else None, progress=show
        ) as mapper:
            md, html_path, plots = analysis.build_report(store, out, req, mapper, show)
    finally:
        show.close()
    console.print(f"wrote {md}, {html_path} and {len(plots)} plot files in {out}")


def main() -> None:
    """Console-script entry point: user errors become one line and exit code 2.

    Typer's standalone mode already turns bad options into "Invalid value for …"
    with exit code 2; errors found in the input files arrive here as
    :class:`UserError`.
    """
    try:
        app()
    except SweepctlError as exc:
        if _DEBUG["on"]:
            raise
        _fail(str(exc))
    except OSError as exc:
        # a path the system refused (not a directory, no permission, disk full): one line
        # naming it; what is stored is written atomically, so nothing stored is damaged
        if _DEBUG["on"]:
            raise
        where = f"{exc.filename}: " if exc.filename else ""
        _fail(
            f"{where}{exc.strerror or exc}; check the path and its permissions "
            "(--debug shows where it happened)"
        )
    except KeyboardInterrupt:
        err_console.print("interrupted")
        sys.exit(130)


if __name__ == "__main__":  # pragma: no cover
    main()
