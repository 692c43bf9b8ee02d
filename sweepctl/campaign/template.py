"""A commented starting recipe with an entropy of its own (``sweepctl new``).

Every key of a recipe appears with what it means, whether it is required or its
default, its allowed range and whether it may change once results are stored, so a
new campaign starts from a file that explains itself rather than from a copy of
somebody else's (whose entropy it would share: same entropy, same random streams).
"""

from __future__ import annotations

import os
import re
import secrets
from pathlib import Path

from sweepctl.errors import SweepctlError

__all__ = ["template_text", "write_template"]

_TEMPLATE = """\
# sweepctl recipe: {name}
# Each key says what it means, [required] or its default, the allowed range, and
# whether it may change once results are stored ("fixed" ones are refused by run).

[campaign]
name = "{name}"                  # [required] 1-120 characters; may change (a label)
description = ""                 # default ""; free text for the report; may change
# Seeds of every replica derive from this entropy, drawn fresh for this file. Keep it:
# it is what makes the campaign reproducible. Another campaign needs its own (sweepctl new).
entropy = 0x{entropy:032x}       # default: drawn when the store is created; fixed

[axes]
# Strip width N: the number of channels across the strip. [required] integers 1-4096.
# Widths may be added or removed later; existing results stay.
widths = [8, 16, 32]
# Coupling x of the network's nodes (x = 0 is the critical point of the self-dual clean
# network). [required] a list, or {{ start, stop, num }} giving the same floats as the
# decimals in a list; |x| <= 10. Values may be added later.
couplings = {{ start = -0.2, stop = 0.2, num = 9 }}
# Node disorder: probability that a node blocks (p_block) or opens (p_open) the channel.
# Default [{{ p = 0.0 }}] (clean network); {{ p = ... }} sets both; p_block + p_open <= 1.
# Values may be added later.
disorder = [{{ p = 0.0 }}]
# Transmission of a blocking node. Default [1e-6]; 9.57e-7 <= epsilon <= 0.1 (below
# that the kernel's accuracy is not proven). Values may be added later.
epsilon = [1e-6]

[precision]
# Relative standard error of each point's Lyapunov exponent at which it stops.
# [required] 0 < target < 1; may be tightened later (reopens the points it affects).
target = 0.01
# Per-point cap on layers over all replicas (or max_cpu_hours = ..., converted once with
# this machine's calibration). Default 256 replicas' worth of layers; may be raised later.
max_layers = 2_000_000

[replica]
# Layers per replica (or duration_seconds = ..., converted once when the store is
# created; the default is 300 s converted with the calibration of the machine that
# runs the driver, on a cluster a login node, so prefer layers). >= 1; fixed.
layers = 10_000
warmup = "auto"                  # default "auto" = max(5N, 32) layers discarded; fixed
strips = 8                       # default 8; independent strips per replica, 2-4096; fixed
initial = 8                      # default 2; replicas in a point's first round, 1-10000
checkpoint_seconds = 180         # default 180; seconds between checkpoints of a replica

[model]
# What computes a replica; fixed. Default "network" (the transfer-matrix kernel).
# "rehearsal" draws strips around a known law instead, charged the kernel's CPU, to
# rehearse a plan or a cluster set-up: Gamma = Gamma_c + F[0] rho + F[1] rho^2 + ...
# + correction N^y with rho = (x - x_c) N^(1/nu), strip noise as the kernel's times
# noise. Keys: nu (0.2-10), Gamma_c (0-10), F (1-8 numbers) [required]; x_c (default
# 0), correction (default 0), y (-5 <= y < 0, needed with a correction), noise
# (default 1). Example: recipes/rehearsal.toml.
kind = "network"

# [goal]
# Optional: aim the campaign at nu. Rounds are then the campaign's: each disorder/epsilon
# slice is fitted after every round and the next replicas go where they shrink nu's
# interval most per CPU-second; precision.target becomes a floor. Both keys together;
# needs >= 2 widths, >= 3 couplings and a calibration (--calibration). May change later.
# nu_halfwidth = 0.05            # 95 % half-width of nu per slice, 0 < nu_halfwidth <= 5
# cpu_hours = 2000               # the campaign's CPU budget, > 0: it stops there
"""


def template_text(name: str, entropy: int | None = None) -> str:
    """The commented recipe for campaign ``name`` with ``entropy`` (fresh if ``None``)."""
    if entropy is None:
        entropy = secrets.randbits(128)
    return _TEMPLATE.format(name=name, entropy=entropy)


def write_template(path: str | Path, name: str | None = None) -> Path:
    """Write a fresh template recipe at ``path``; never overwrites an existing file.

    The campaign name defaults to the file's stem.
    """
    path = Path(path)
    if name is None:
        name = path.stem
    if not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9 ._+-]{0,119}", name):
        raise SweepctlError(
            f"--name: {name!r} is not a usable campaign name; use up to 120 letters, digits, "
            "spaces and ._+- (e.g. --name my-crossing)"
        )
    text = template_text(name)
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
    except FileExistsError:
        raise SweepctlError(
            f"{path}: already exists; choose another file name (nothing was written)"
        ) from None
    except OSError as exc:
        raise SweepctlError(f"{path}: cannot write it ({exc.strerror}); check the path") from None
    with os.fdopen(fd, "w", encoding="utf-8") as f:
        f.write(text)
    return path
