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

#: ``--parts N``: how many parts (draws of the random impairments) of each profile with random
#: impairments to run, for ``measure``, ``grade`` and ``explore``; overrides the profile's
#: ``impairments.parts``. Checked by :func:`audiodsm.evaluate.parts.check_parts` before any
#: work (one line, exit 2).
parts_option = click.option(
    "--parts",
    type=int,
    default=None,
    metavar="N",
    help="Run N parts of each profile that has random impairments (element mismatch, random "
    "jitter, analog noise), each with its own seed; default: the profile's impairments.parts. "
    "A profile without random impairments runs once.",
)
