"""Command-line interface: parse, call, print. All terminal output lives here."""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.table import Table

from sweepctl import __version__

app = typer.Typer(
    help="Seeded, resumable Lyapunov-exponent campaigns for network models.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
console = Console()
err_console = Console(stderr=True)
_DEBUG = {"on": False}


class UserError(Exception):
    """A mistake in the user's input: printed as one line, exit code 2."""


def _fail(message: str, code: int = 2) -> None:
    err_console.print(f"[bold red]error:[/] {message}", highlight=False, soft_wrap=True)
    sys.exit(code)


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
    json_out: Annotated[
        Path | None, typer.Option("--json", help="Write the calibration to this JSON file.")
    ] = None,
) -> None:
    """Measure kernel throughput per width on this machine (one BLAS thread)."""
    from sweepctl.bench import bench_widths, machine_info, zgemm_gflops

    ws = _parse_widths(widths)
    with console.status("compiling the kernel and measuring…"):
        rows = bench_widths(ws, strips=strips, seconds=seconds)
        gemm = zgemm_gflops()
    table = Table(title=f"sweepctl bench — {strips} strips, one BLAS thread, x = 0, p = 0")
    for col in ("N", "layers/s per strip", "strip-layers/s", "QR per layer", "GFLOP/s"):
        table.add_column(col, justify="right")
    for r in rows:
        table.add_row(
            str(r.width),
            f"{r.layers_per_second:,.0f}",
            f"{r.strip_layers_per_second:,.0f}",
            f"{r.qr_per_layer:.3f}",
            f"{r.gflops:.2f}",
        )
    console.print(table)
    console.print(f"complex matrix multiply (zgemm 512, one thread): {gemm:.1f} GFLOP/s")
    if json_out is not None:
        payload = {
            "kind": "sweepctl-kernel-calibration",
            "machine": machine_info(),
            "zgemm_gflops": gemm,
            "widths": [r.as_dict() for r in rows],
        }
        try:
            json_out.write_text(json.dumps(payload, indent=2) + "\n")
        except OSError as exc:
            raise UserError(f"--json: cannot write {str(json_out)!r}: {exc.strerror}") from None
        console.print(f"wrote {json_out}")


def main() -> None:
    """Console-script entry point: user errors become one line and exit code 2.

    Typer's standalone mode already turns bad options into "Invalid value for …"
    with exit code 2; errors found in the input files arrive here as
    :class:`UserError`.
    """
    try:
        app()
    except UserError as exc:
        if _DEBUG["on"]:
            raise
        _fail(str(exc))
    except KeyboardInterrupt:
        err_console.print("interrupted")
        sys.exit(130)


if __name__ == "__main__":  # pragma: no cover
    main()
