"""Options that several commands share, defined once so they mean the same everywhere."""

from __future__ import annotations

import click

#: ``--short``: the test battery's short plan (:meth:`BatteryPlan.quick`), for ``measure`` and
#: ``grade``.
short_plan_option = click.option(
    "--short",
    is_flag=True,
    help="Shorter captures and fewer points (a preview; coarser resolution).",
)
