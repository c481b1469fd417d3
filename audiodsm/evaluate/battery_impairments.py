"""The battery's impairment readings: what element mismatch, clock jitter and analog noise cost.

Two measurement runs and one computed reading, beside the runs of
:mod:`audiodsm.evaluate.battery_runs`:

``element_mismatch``
    For a multi-level NRZ output whose unit elements are mismatched: the -1 dBFS THD+N and the
    -60 dBFS dynamic range (A-weighted) of the profile as it is, against the same chain with
    ideal unit elements. Both chains run with the same dither seed and the same part, so their
    modulator outputs are identical and the difference is the mismatch alone: what the
    element-selection logic leaves of the profile's mismatch in the audio band.
``jitter_sweep``
    The -60 dBFS dynamic range with white clock jitter of a few standard deviations (1, 10 and
    100 ps rms by default) on the output edges, in place of the profile's own random jitter:
    the dynamic range a designer keeps with a clock of that quality (PDM, NRZ, and PWM without
    dead time).
The analog noise floor
    The band-limited output noise that the profile's analog noise density alone puts out
    (``density**2`` over 20 Hz .. 20 kHz, with its 1/f part and the weighting), referred to
    full scale: computed, not simulated; the simulated chain adds exactly this (checked in
    tests/test_battery_impairments.py).

:func:`assemble_impairments` turns the runs' partial results into metrics and the
``dynamic_range_vs_jitter`` curve.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from audiodsm.evaluate.battery_runs import (
    _BAND,
    _TAIL_S,
    _TEST_HZ,
    _chain_run,
    _meter,
    _run_faults,
    _tone,
    _tone_came_out,
)

#: White jitter (rms, seconds) of the dynamic-range-against-jitter readings with a metric name.
JITTER_METRICS = {
    1e-12: "jitter_dynamic_range_db_at_1ps",
    1e-11: "jitter_dynamic_range_db_at_10ps",
    1e-10: "jitter_dynamic_range_db_at_100ps",
}
MISMATCH_METRICS = (
    "mismatch_free_thd_n_db_at_minus1_dbfs",
    "mismatch_free_dynamic_range_db_a",
    "mismatch_thd_n_cost_db",
    "mismatch_dynamic_range_cost_db",
)
ANALOG_NOISE_METRICS = ("analog_noise_dbfs", "analog_noise_dbfs_a")
#: A -60 dBFS tone farther than this from its level gives no dynamic range (AES17 practice,
#: as the battery's own dynamic-range test).
_DR_TONE_DB = 1.0


def _with_impairments(profile, **keys):
    return replace(profile, impairments=replace(profile.impairments, **keys))


def analog_noise_floor(profile, gain):
    """The in-band noise the profile's analog noise alone adds, per weighting (dBFS).

    Parameters
    ----------
    profile : ChainProfile
    gain : float
        The chain's calibrated gain, volts per full-scale unit (``Chain.gain``).

    Returns
    -------
    dict or None
        ``{"unweighted": dBFS, "a": dBFS}``, or None when the profile sets no noise density.
        The power is ``D**2 (1 + f_c / f)`` integrated over 20 Hz .. 20 kHz with the
        weighting's power gain, divided by ``gain**2`` (full-scale units); 0 dBFS is a
        full-scale sine (power 0.5, AES17).

    References
    ----------
    .. [1] The definition of a one-sided noise power spectral density: white noise of density
       ``D`` has power ``D**2 B`` in a band ``B``; a 1/f corner ``f_c`` gives ``D**2 f_c /
       f`` more at ``f`` (e.g. C. D. Motchenbacher and J. A. Connelly, "Low-Noise Electronic
       System Design", Wiley 1993, ch. 1; from memory).
    """
    from audiodsm.measure.weighting import weighting_power_gain

    imp = profile.impairments
    if imp.noise_density_nv <= 0.0:
        return None
    density = (imp.noise_density_nv * 1e-9) ** 2  # V^2 / Hz
    f = np.geomspace(_BAND[0], _BAND[1], 40001)  # fine on a log axis: the 1/f part
    shape = 1.0 + imp.noise_corner_hz / f
    out = {}
    for w, name in (("unweighted", "analog_noise_dbfs"), ("a", "analog_noise_dbfs_a")):
        band = float(np.trapezoid(shape * weighting_power_gain(f, w), f))
        power = density * band / float(gain) ** 2
        out[name] = 10.0 * math.log10(power / 0.5)
    return out


def _dynamic_range(y, rate, settle_s, weightings=("unweighted", "a")):
    """(dynamic range per weighting or None, fault text) of a -60 dBFS 997 Hz capture."""
    r = _meter(y, rate, _TEST_HZ, weightings, settle_s)
    if r.fundamental_dbfs is None or abs(r.fundamental_dbfs + 60.0) > _DR_TONE_DB:
        return None, "the -60 dBFS tone was lost: " + _tone_came_out(r.fundamental_dbfs)
    return {w: -r.noise_dbfs[w] for w in weightings}, ""


def jitter_scales_linearly(profile) -> bool:
    """True when one chain run can serve every jitter of the sweep (see :func:`_test_jitter`).

    The edge error is linear in the random displacements when every frame is one segment
    (PDM, NRZ without return to zero) and nothing else moves the edges (no sinusoidal
    jitter, no edge ramps): each edge's error is ``-step * shift``, in the frame after the
    edge or before it by the sign of the shift alone (stages/jitter.py).
    """
    imp = profile.impairments
    return (
        profile.output.kind in ("pdm", "nrz")
        and not imp.return_to_zero
        and imp.jitter_sine_peak_s == 0.0
        and imp.rise_time_s == 0.0
        and imp.fall_time_s == 0.0
    )


def _test_jitter(ctx, profile, sigmas_s):
    """The -60 dBFS dynamic range with white edge jitter of each of ``sigmas_s`` (seconds rms).

    ``sigmas_s`` is one jitter or a sequence of them. Where the edge error is linear in the
    displacements (:func:`jitter_scales_linearly`), one chain run at the largest jitter
    serves all of them: the displacements are ``sigma`` times the same normal draws, so the
    listening output with jitter ``sigma`` is the run's output plus ``(sigma / largest - 1)``
    times the part the random jitter makes (``keep="jitter_error"``), the same numbers as a
    run of its own to rounding (tests/test_battery_impairments.py). Otherwise one run a
    jitter.
    """
    from audiodsm.errors import ProfileError
    from audiodsm.profile_checks import _check_impairments

    sigmas = [float(sigmas_s)] if np.ndim(sigmas_s) == 0 else [float(v) for v in sigmas_s]
    plan, rate = ctx.plan, ctx.rate
    x = _tone(-60.0, rate, plan.settle_s + plan.tone_s + _TAIL_S)
    settle = int(round(plan.settle_s * rate))
    points, usable = {}, []
    for sigma in sigmas:
        points[sigma] = {"sigma_s": sigma, "dr_db": None, "dr_db_a": None, "reason": ""}
        try:
            # what the jitter model does not hold (PWM with dead time or on-resistance) is
            # refused as a profile would be at load, and jitter beyond half a frame by the chain
            _check_impairments(_with_impairments(profile, jitter_rms_s=sigma), "")
            usable.append(sigma)
        except ProfileError as exc:
            why = f"jitter not modelled here: {exc.key}: {exc.message}" if exc.key else str(exc)
            points[sigma]["reason"] = why
    outputs, stats = {}, []
    try:
        if len(usable) > 1 and jitter_scales_linearly(profile):
            top = max(usable)
            res = _chain_run(
                _with_impairments(profile, jitter_rms_s=top),
                x,
                rate=rate,
                keep=("listening", "jitter_error"),
            )
            part = res.jitter_error[: len(res.listening), 0]
            for sigma in usable:
                y = res.listening[:, 0]
                outputs[sigma] = (y if sigma == top else y + (sigma / top - 1.0) * part, res)
            stats.append((res.stats, 0, 10 ** (-60 / 20)))
        else:
            for sigma in usable:
                res = _chain_run(_with_impairments(profile, jitter_rms_s=sigma), x, rate=rate)
                outputs[sigma] = (res.listening[:, 0], res)
                stats.append((res.stats, 0, 10 ** (-60 / 20)))
    except ProfileError as exc:  # refused by the chain itself
        why = f"jitter not modelled here: {exc.key}: {exc.message}" if exc.key else str(exc)
        for sigma in usable:
            points[sigma]["reason"] = why
        outputs, stats = {}, []
    for sigma, (y, res) in outputs.items():
        point = points[sigma]
        faults = _run_faults(res.stats, 0, y[settle:])
        dr, lost = _dynamic_range(y, rate, plan.settle_s)
        if lost:
            faults.append(lost)
        if dr is not None:
            point["dr_db"], point["dr_db_a"] = dr["unweighted"], dr["a"]
        point["reason"] = "; ".join(faults)
    out = {"jitter_sweep": [points[s] for s in sigmas]}
    if stats:
        out["stats"] = stats
    return out


def _test_mismatch(ctx, profile):
    """-1 dBFS THD+N and -60 dBFS DR(A), as the profile is and with ideal unit elements."""
    imp = profile.impairments
    if profile.output.kind != "nrz" or imp.element_mismatch <= 0.0:
        return {
            "mismatch": None,
            "notes": ["element mismatch: the profile has no mismatched unit elements (NRZ "
                      "output with impairments.element_mismatch > 0), so no reading"],
        }  # fmt: skip
    plan, rate = ctx.plan, ctx.rate
    seconds = plan.settle_s + plan.tone_s + _TAIL_S
    x = np.stack([_tone(-1.0, rate, seconds), _tone(-60.0, rate, seconds)], axis=1)
    settle = int(round(plan.settle_s * rate))
    readings, faults, stats = {}, [], []
    for label, prof in (
        ("as built", profile),
        ("ideal elements", _with_impairments(profile, element_mismatch=0.0)),
    ):
        # the same profile seed for both: identical modulator outputs, so the readings differ
        # by the unit elements alone
        res = _chain_run(prof, x, rate=rate)
        loud = res.listening[:, 0]
        r = _meter(loud, rate, _TEST_HZ, ("unweighted",), plan.settle_s)
        bad = _run_faults(res.stats, 0, loud[settle:]) + _run_faults(
            res.stats, 1, res.listening[settle:, 1]
        )
        if r.fundamental_dbfs is None or abs(r.fundamental_dbfs + 1.0) > 3.0:
            bad.append("the -1 dBFS tone was lost: " + _tone_came_out(r.fundamental_dbfs))
        dr, lost = _dynamic_range(res.listening[:, 1], rate, plan.settle_s, ("a",))
        if lost:
            bad.append(lost)
        faults += [f"{label}: {b}" for b in bad]
        readings[label] = (r.thd_n_db.get("unweighted"), None if dr is None else dr["a"])
        stats += [(res.stats, 0, 10 ** (-1 / 20)), (res.stats, 1, 10 ** (-60 / 20))]
    (thd, dr), (thd0, dr0) = readings["as built"], readings["ideal elements"]
    out = {
        "mismatch": {
            "mismatch_free_thd_n_db_at_minus1_dbfs": thd0,
            "mismatch_free_dynamic_range_db_a": dr0,
            "mismatch_thd_n_cost_db": None if thd is None or thd0 is None else thd - thd0,
            "mismatch_dynamic_range_cost_db": None if dr is None or dr0 is None else dr0 - dr,
            "as_built_thd_n_db": thd,
            "as_built_dynamic_range_db_a": dr,
        },
        "stats": stats,
        "notes": [
            f"element mismatch: {imp.element_mismatch:g} relative, "
            f"{imp.element_selection} selection, part {imp.part_seed}; -1 dBFS THD+N and "
            f"-60 dBFS dynamic range (A) over {plan.tone_s:g} s, as built and with ideal unit "
            "elements, both with the same dither (identical modulator outputs)"
        ],
    }
    if faults:
        out["invalid"] = {k: "; ".join(faults) for k in MISMATCH_METRICS}
    return out


def assemble_impairments(results, metrics, curves, notes, invalid):
    """Metrics and the jitter curve from the impairment runs (in place).

    ``jitter_dynamic_range_db_at_*ps`` from the jitter runs (invalid with the run's reason),
    the curve ``dynamic_range_vs_jitter`` (``sigma_s``, ``dynamic_range_db``,
    ``dynamic_range_db_a``, ``predicted_dynamic_range_db``, ``invalid_reason``), and the
    element-mismatch readings.

    The predicted curve adds the textbook jitter noise (``jitter_noise_dbfs_at_1ps`` plus
    ``20 log10(sigma / 1 ps)``; Schreier & Temes 2005) to the noise of the battery's own
    -60 dBFS reading (``dynamic_range_db``); NaN when either is missing.
    """
    points = sorted(
        (p for part in results for p in part.get("jitter_sweep", ())), key=lambda p: p["sigma_s"]
    )
    if points:
        base, j1 = metrics.get("dynamic_range_db"), metrics.get("jitter_noise_dbfs_at_1ps")
        known = all(
            v is not None and k not in invalid and math.isfinite(v)
            for k, v in (("dynamic_range_db", base), ("jitter_noise_dbfs_at_1ps", j1))
        )

        def predicted(sigma_s):
            if not known:
                return np.nan
            jitter = j1 + 20.0 * math.log10(sigma_s / 1e-12)
            return -10.0 * math.log10(10.0 ** (-base / 10.0) + 10.0 ** (jitter / 10.0))

        def shown(p, key):
            return np.nan if p["reason"] or p[key] is None else p[key]

        curves["dynamic_range_vs_jitter"] = {
            "sigma_s": np.array([p["sigma_s"] for p in points]),
            "dynamic_range_db": np.array([shown(p, "dr_db") for p in points], dtype=float),
            "dynamic_range_db_a": np.array([shown(p, "dr_db_a") for p in points], dtype=float),
            "predicted_dynamic_range_db": np.array([predicted(p["sigma_s"]) for p in points]),
            "invalid_reason": np.array([p["reason"] for p in points]),
        }
        for p in points:
            name = next(
                (n for s, n in JITTER_METRICS.items() if math.isclose(s, p["sigma_s"])), None
            )
            if name is None:
                continue
            metrics[name] = p["dr_db"]
            if p["reason"]:
                invalid[name] = p["reason"]
        notes.append(
            "dynamic range against jitter: -60 dBFS 997 Hz with white jitter of "
            + ", ".join(f"{p['sigma_s'] * 1e12:g}" for p in points)
            + " ps rms on the output edges (in place of the profile's own random jitter), "
            "unweighted and A-weighted"
        )
    for part in results:
        if "mismatch" not in part:
            continue
        got = part["mismatch"] or {}
        for name in MISMATCH_METRICS:
            metrics[name] = got.get(name)
