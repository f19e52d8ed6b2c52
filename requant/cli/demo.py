"""``requant demo``: the main job on the bundled demo audio."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer

from requant.cli.common import CAUTION, Overwrite

__all__ = ["demo"]


def demo(
    out: Annotated[Path, typer.Option("--out", help="Folder for the demo results.")] = Path(
        "demo_output"),
    source: Annotated[Path | None, typer.Option(
        "--source", help="Folder of demo audio (default: the bundled one).")] = None,
    seed: Annotated[int, typer.Option(help="Dither seed for the demo.")] = 2026,
    overwrite: Overwrite = False,
):
    """Run the main job on the bundled demo audio and print measured against predicted."""
    from requant.demo import run_demo

    print(run_demo(out, source=source, seed=seed, overwrite=overwrite))
    print(CAUTION, file=sys.stderr)
