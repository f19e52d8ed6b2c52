"""``requant rate show``: what the sample-rate converter does for a pair of rates."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated

import typer

from requant.cli.common import Overwrite

__all__ = ["rate_show"]


def rate_show(
    rate_from: Annotated[int, typer.Option("--from", help="Input sample rate, Hz.")],
    rate_to: Annotated[int, typer.Option("--to", help="Output sample rate, Hz.")],
    plot: Annotated[Path | None, typer.Option(
        "--plot", help="Plot the filter's magnitude response (PNG).")] = None,
    as_json: Annotated[bool, typer.Option(
        "--json", help="Print the design as JSON instead of text.")] = False,
    overwrite: Overwrite = False,
):
    """Describe the rate converter's filter: length, passband ripple, rejection, delay."""
    from requant.audio_io.atomic import check_outputs
    from requant.dsp.resample import design

    check_outputs([], [plot], overwrite=overwrite)
    rf = design(rate_from, rate_to)
    if as_json:
        print(json.dumps(rf.to_dict(), indent=2))
    else:
        print(rf.describe())
    if plot is not None:
        from requant.report.rateplot import plot_rate_filter

        plot_rate_filter(rf, plot)
        if not as_json:
            print(f"wrote {plot}")
