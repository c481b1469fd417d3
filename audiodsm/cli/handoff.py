"""``audiodsm plan`` and ``audiodsm handoff``: the fixed-point loop and the RTL engineer's folder.

``plan`` runs a profile's float loop, plans the word of every node against a noise budget,
prints the plan as a table and, with ``--output``, writes the profile with its ``[fixed_point]``
section. ``handoff`` checks a profile's ``[fixed_point]`` section and writes the handoff folder
(word formats, coefficients, test vectors, generated Verilog, README).
"""

from __future__ import annotations

import json

import click

__all__ = ["handoff", "plan"]

_ROUNDING = ("truncate", "round-half-up", "convergent")
_OVERFLOW = ("saturate", "wrap")


@click.command("plan")
@click.argument("profile", type=click.Path())
@click.option(
    "--budget-db",
    type=click.FloatRange(0.0, 60.0),
    default=20.0,
    show_default=True,
    help="All roundings together stay this many dB under the loop's own in-band noise.",
)
@click.option(
    "--margin-db",
    type=click.FloatRange(0.0, 24.0),
    default=6.0,
    show_default=True,
    help="Range of every state above its peak at the maximum stable amplitude.",
)
@click.option(
    "--rounding", type=click.Choice(_ROUNDING), default="round-half-up", show_default=True
)
@click.option("--overflow", type=click.Choice(_OVERFLOW), default="saturate", show_default=True)
@click.option(
    "--coefficient-bits",
    type=click.IntRange(0, 40),
    default=0,
    show_default=True,
    help="Fractional bits of the coefficients; 0 chooses the fewest that keep the NTF.",
)
@click.option(
    "--csd-digits",
    type=click.IntRange(0, 16),
    default=0,
    show_default=True,
    help="At most this many non-zero signed digits per coefficient (0: no limit).",
)
@click.option(
    "--rate-hz", type=int, default=48000, show_default=True, help="Audio rate of the chain."
)
@click.option(
    "--output",
    type=click.Path(dir_okay=False),
    default=None,
    help="Write the profile with the planned [fixed_point] section here (may be PROFILE "
    "itself; comments are not kept).",
)
@click.option("--json", "as_json", is_flag=True, help="Print the plan as JSON instead.")
def plan(
    profile,
    budget_db,
    margin_db,
    rounding,
    overflow,
    coefficient_bits,
    csd_digits,
    rate_hz,
    output,
    as_json,
):
    """Plan the fixed-point words of PROFILE's loop from a float run and a noise budget."""
    from audiodsm.errors import OutputError
    from audiodsm.hardware.handoff import plan_profile, profile_with_plan
    from audiodsm.io_files import replace_text_atomically
    from audiodsm.profile import load_profile
    from audiodsm.profile_text import profile_to_toml

    prof = load_profile(profile)
    result, facts, stable = plan_profile(
        prof,
        rate_hz=rate_hz,
        budget_db=budget_db,
        margin_db=margin_db,
        rounding=rounding,
        overflow=overflow,
        coefficient_fraction_bits=coefficient_bits,
        coefficient_digits=csd_digits,
    )
    if as_json:
        data = result.to_dict()
        data.update(
            profile=prof.name,
            stable_amplitude=facts.stable_amplitude,
            quantized_stable_amplitude=stable,
            band_edge_hz=facts.band_edge_hz,
        )
        click.echo(json.dumps(data))
    else:
        click.echo(
            f"{prof.name}: order {facts.loop.order}, {facts.levels} levels, OSR {facts.osr}; "
            f"in-band noise over 0..{facts.band_edge_hz:g} Hz"
        )
        click.echo(result.table())
        click.echo(
            f"stable amplitude {facts.stable_amplitude:.3f} (float), {stable:.3f} with the "
            "quantized coefficients"
        )
    if output:
        try:
            replace_text_atomically(output, profile_to_toml(profile_with_plan(prof, result)))
        except OSError as exc:
            raise OutputError(f"{output}: cannot write ({exc.strerror or exc})") from None
        click.echo(f"wrote {output}", err=True)


@click.command("handoff")
@click.argument("profile", type=click.Path())
@click.argument("outdir", type=click.Path(file_okay=False))
@click.option(
    "--rate-hz", type=int, default=48000, show_default=True, help="Audio rate of the chain."
)
@click.option(
    "--vector-samples",
    type=click.IntRange(min=1024),
    default=32768,
    show_default=True,
    help="Modulator samples per stimulus in the test vectors.",
)
def handoff(profile, outdir, rate_hz, vector_samples):
    """Write OUTDIR for the RTL engineer from PROFILE's [fixed_point] section.

    The folder holds the word formats and coefficients (JSON), input and expected output
    vectors of the battery's stimuli ($readmemh hex), the generated Verilog and a README. It
    is written under a temporary name and renamed when complete.
    """
    from audiodsm.hardware.handoff import write_handoff
    from audiodsm.profile import load_profile

    prof = load_profile(profile)
    summary = write_handoff(prof, outdir, rate_hz=rate_hz, vector_samples=vector_samples)
    click.echo(
        f"{prof.name}: wrote {len(summary.files)} files to {summary.folder}; in-band noise "
        f"{summary.in_band_noise_dbfs:.1f} dBFS fixed point, "
        f"{summary.float_in_band_noise_dbfs:.1f} dBFS float"
    )
