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

#: ``--scheduler tcp://host:port``: run the batteries on an existing Dask scheduler's workers
#: (``$AUDIODSM_SCHEDULER`` when the option is absent), for ``grade``, ``measure``, ``explore``.
scheduler_option = click.option(
    "--scheduler",
    envvar="AUDIODSM_SCHEDULER",
    default=None,
    metavar="tcp://HOST:PORT",
    help="Run the batteries on this Dask scheduler's workers instead of a local cluster "
    "(default: $AUDIODSM_SCHEDULER).",
)
