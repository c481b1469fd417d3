"""Putting a battery's runs together: metrics, curves, notes and the validity of each reading.

:func:`audiodsm.evaluate.battery.run_battery` runs the measurement runs
(:mod:`audiodsm.evaluate.battery_runs`) and hands their raw results to :func:`_assemble`, which
builds the flat metrics, the curves behind them, the notes and the reasons a reading is invalid
(overload, lost tone, clipping, a value below what the chain can do).
"""

from __future__ import annotations

import math

import numpy as np

from audiodsm.evaluate._plain import plain_scalar
from audiodsm.evaluate.battery_runs import (
    _BAND,
    _FLOORED_METRICS,
    _LOST_DB,
    _WEIGHTINGS,
    NUMERIC_FLOOR_DBFS,
    _db,
    _tone_came_out,
)

#: How far below the linear-model noise floor of the loop a noise reading may fall before it
#: is called impossible. The linear model (white quantization error of power step^2/12 shaped
#: by the NTF) is accurate to a few dB for single-bit and dithered loops (Schreier & Temes
#: 2005, ch. 4); 20 dB is a safety factor, not a precision estimate.
_FLOOR_MARGIN_DB = 20.0


_SCALARS = (
    "dynamic_range_db",
    "dynamic_range_db_a",
    "dynamic_range_db_ccir",
    "out_of_band_noise_dbfs",
    "carrier_ripple_dbfs",
    "jitter_noise_dbfs_at_1ps",
    "output_step_rms_fs",
    "analog_noise_dbfs",
    "analog_noise_dbfs_a",
    "dc_offset_fs",
    "idle_noise_dbfs",
    "idle_noise_dbfs_a",
    "idle_noise_dbfs_ccir",
    "switching_rate_hz",
    "dc_offset_dbfs",
    "passband_ripple_db",
    "image_rejection_db",
    "image_rejection_noise_limited",
    "imd_smpte_db",
    "imd_difference_db",
    "supply_ripple_sideband_db",
    "output_peak_volts",
    "load_current_peak_amperes",
    "inductor_current_peak_amperes",
    "switch_conduction_watts",
    "load_power_watts",
)


def _came_through(point) -> bool:
    """Whether a sweep tone came out within ``_LOST_DB`` of its level (AES17 gain at 997 Hz)."""
    tone = point["tone_dbfs"]
    return tone is not None and math.isfinite(tone) and abs(tone - point["level_dbfs"]) <= _LOST_DB


def _sweep_reason(p, onset, floor):
    """Why a sweep point's THD+N cannot be read honestly ("" when it can)."""
    lv = p["level_dbfs"]
    reasons = []
    if p["overload_count"] > 0:
        reasons.append(f"loop overloaded from {onset:g} dBFS")
    reasons.extend(f for f in p.get("faults", ()) if not f.startswith("loop overloaded"))
    if not _came_through(p):
        reasons.append(f"tone lost at {lv:g} dBFS: " + _tone_came_out(p["tone_dbfs"]))
    if reasons:  # the impossibility checks below are the backstop for a run that looked sound
        return "; ".join(reasons)
    for key, noise_key, w in (
        ("thd_n_db", "noise_dbfs", "unweighted"),
        ("thd_n_db_a", "noise_dbfs_a", "a"),
    ):
        v, noise = p[key], p.get(noise_key)
        if v is None or not math.isfinite(v):
            return f"THD+N reading is {v}"
        if noise is None:
            continue
        if noise < NUMERIC_FLOOR_DBFS:
            return (
                f"impossible: THD+N {v:.1f} dB at {lv:g} dBFS puts the noise below the "
                f"simulation's numeric floor ({NUMERIC_FLOOR_DBFS:g} dBFS)"
            )
        if floor is not None and noise < floor[w] - _FLOOR_MARGIN_DB:
            return (
                f"impossible: THD+N {v:.1f} dB at {lv:g} dBFS puts the noise "
                f"({noise:.1f} dBFS) more than {_FLOOR_MARGIN_DB:g} dB below the chain's own "
                f"noise floor ({floor[w]:.1f} dBFS)"
            )
    return ""


def _chain_noise_floor(linear, metrics, invalid):
    """The chain's own noise floor per weighting (dBFS), or None when there is none.

    The lower of the loop's linear-model floor (:func:`_linear_noise_floor`) and the valid
    idle-channel noise reading. A single-bit loop at rest can settle into a pattern with
    almost no in-band noise (its idle noise then lies well under the linear model), so the
    measured idle noise lowers the floor; a reading far below even that is impossible.
    """
    names = ("idle_noise_dbfs", "idle_noise_dbfs_a", "idle_noise_dbfs_ccir")
    out = {}
    for w, name in zip(_WEIGHTINGS, names, strict=True):
        have = [linear[w]] if linear is not None else []
        v = metrics.get(name)
        if v is not None and name not in invalid and math.isfinite(v):
            have.append(float(v))
        if have:
            out[w] = min(have)
    return out if len(out) == len(_WEIGHTINGS) else None


def _assemble(results, tests, plan, profile):
    """Merge the runs' partial results into metrics, curves, notes and invalid readings."""
    metrics, curves, notes, invalid = {}, {}, [], {}
    sweep, overload, dc, lines, fsweep = [], [], [], [], []
    stats = []
    msa = None
    stab = None
    for part in results:
        for k in _SCALARS:
            if k in part:
                metrics[k] = part[k]
        for k, v in part.items():
            if k.startswith("curve_"):
                curves[k[6:]] = v
        notes.extend(part.get("notes", ()))
        invalid.update(part.get("invalid", {}))
        sweep.extend(part.get("sweep", ()))
        overload.extend(part.get("overload", ()))
        dc.extend(part.get("dc", ()))
        fsweep.extend(part.get("frequency_sweep", ()))
        stats.extend(part.get("stats", ()))
        if "silence_lines" in part:
            lines.append(("silence", 0.0, part["silence_lines"], part.get("silence_faults", "")))
        if "msa" in part:
            stab = part
            msa = part["msa"]
    msa_amp = msa if msa is not None else 1.0
    msa_db = _db(msa_amp)
    linear = stab.get("noise_floor") if stab is not None else None
    floor = _chain_noise_floor(linear, metrics, invalid)

    if stab is not None:
        metrics["max_stable_amplitude_dbfs"] = msa_db
        ntf = stab["ntf"]
        if "spectrum" in curves:
            fm = stab["modulator_rate_hz"]
            f = curves["spectrum"]["frequency_hz"]
            # an exact zero of the NTF (at DC, say) has no level in dB: NaN there (an empty
            # CSV cell, a gap in a plot), not the -6000 dB of a numeric floor
            mag = np.abs(ntf.response(f / fm))
            with np.errstate(divide="ignore"):
                curves["spectrum"]["ntf_gain_db"] = np.where(
                    mag > 0.0, 20.0 * np.log10(mag), np.nan
                )
        density, gain = stab.get("noise_density") or (None, None)
        for name in ("spectrum", "audio_spectrum"):
            if density is not None and name in curves:
                with np.errstate(divide="ignore"):
                    f = curves[name]["frequency_hz"]
                    # where the NTF has an exact zero (a zero at DC puts one on the 0 Hz bin)
                    # the model predicts no noise at all: no density in dB, NaN (docs/report.md)
                    d = density(f)
                    pred = np.where(d > 0.0, 10.0 * np.log10(d / 0.5), np.nan)
                    if name == "audio_spectrum":  # the listening decimator's edge: no model
                        pred = np.where(f <= _BAND[1], pred, np.nan)
                    curves[name]["predicted_density_dbfs_per_hz"] = pred
                    # the quantizer gain the prediction assumes (1: a multi-level quantizer's
                    # own; else a single-bit quantizer's effective gain, fitted to a run)
                    k = 1.0 if gain is None else gain.gain
                    curves[name]["predicted_quantizer_gain"] = np.array([k])

    onset = None
    if sweep or overload:
        pts = sorted(sweep + overload, key=lambda p: p["level_dbfs"])
        over = [p["level_dbfs"] for p in pts if p["overload_count"] > 0]
        onset = over[0] if over else None
        metrics["overload_onset_dbfs"] = onset
        # One definition of overload for both metrics (ModulatorState.overload_count: the
        # guard acted or a multi-level quantizer clipped). The stable amplitude is the highest
        # level at which no run overloaded: a swept tone that overloaded caps it below its
        # level, at the highest swept level that did not (docs/battery.md).
        if stab is not None and onset is not None and msa_db >= onset:
            clean = [p["level_dbfs"] for p in pts if p["level_dbfs"] < onset]
            notes.append(
                f"stability: the search found {msa_db:.2f} dBFS, but the level sweep overloaded "
                f"from {onset:g} dBFS; the maximum stable amplitude is capped below that"
            )
            if clean:
                msa_db = max(clean)
                msa_amp = 10.0 ** (msa_db / 20.0)
                metrics["max_stable_amplitude_dbfs"] = msa_db
            else:
                invalid["max_stable_amplitude_dbfs"] = (
                    f"the loop overloaded at every swept level from {onset:g} dBFS"
                )

    if sweep:
        sweep.sort(key=lambda p: -p["level_dbfs"])
        for p in sweep:
            p["reason"] = _sweep_reason(p, onset, floor)
        by_level = {p["level_dbfs"]: p for p in sweep}
        for lv, name in ((-1.0, "minus1"), (-20.0, "minus20")):
            if lv in by_level:
                p = by_level[lv]
                for key in ("thd_n_db", "thd_n_db_a"):
                    metric = f"{key}_at_{name}_dbfs"
                    metrics[metric] = p[key]
                    if p["reason"]:
                        invalid[metric] = p["reason"]

        def shown(p, key):
            # a curve never carries a number the battery calls invalid or impossible
            v = p[key]
            if v is None or (key.startswith("thd_n") and p["reason"]):
                return np.nan
            return np.nan if key == "tone_dbfs" and v < NUMERIC_FLOOR_DBFS else v

        curves["thd_n_vs_level"] = {
            k: np.array([shown(p, k) for p in sweep], dtype=float)
            for k in ("level_dbfs", "tone_dbfs", "thd_n_db", "thd_n_db_a")
        }
        curves["thd_n_vs_level"]["overload_count"] = np.array(
            [p["overload_count"] for p in sweep], dtype=float
        )
        curves["thd_n_vs_level"]["invalid_reason"] = np.array([p["reason"] for p in sweep])
        # a tone that does not come through (a loop stuck in a limit cycle or dead zone) has
        # no noise floor "under" it: it is reported as lost, not as a noise level
        lost = [p["level_dbfs"] for p in sweep if not _came_through(p)]
        metrics["tone_lost_at_dbfs"] = max(lost) if lost else None
        used = [
            p
            for p in sweep
            if -90.0 <= p["level_dbfs"] <= 0.0
            and p["level_dbfs"] <= msa_db + 1e-9
            and not p["reason"]
            and p.get("noise_clear_dbfs_a") is not None
        ]
        clear = [p["noise_clear_dbfs_a"] for p in used]
        metrics["noise_modulation_db"] = (max(clear) - min(clear)) if len(clear) >= 2 else None
        if len(clear) < 2:
            invalid["noise_modulation_db"] = (
                f"only {len(clear)} valid sweep level(s) from 0 to -90 dBFS at or below the "
                "maximum stable amplitude; a spread needs two"
            )
        if lost:
            notes.append(
                f"level sweep: the 997 Hz tone did not come through within {_LOST_DB:g} dB at "
                + ", ".join(f"{v:g}" for v in sorted(lost, reverse=True))
                + " dBFS (left out of the noise modulation)"
            )
        bad = [p for p in sweep if p["reason"]]
        if bad:
            notes.append(
                "level sweep: THD+N invalid at "
                + ", ".join(f"{p['level_dbfs']:g}" for p in bad)
                + f" dBFS (at {bad[0]['level_dbfs']:g} dBFS: {bad[0]['reason']})"
            )
        curves["noise_vs_level"] = {
            "level_dbfs": np.array([p["level_dbfs"] for p in sweep]),
            "noise_dbfs_a": np.array([p["noise_dbfs_a"] for p in sweep]),
            "noise_clear_dbfs_a": np.array(
                [
                    np.nan if p.get("noise_clear_dbfs_a") is None else p["noise_clear_dbfs_a"]
                    for p in sweep
                ]  # fmt: skip
            ),
        }
        for p in sweep:
            if "lines" in p:
                # a lost tone leaves the idle-tone search under it honest; a run fault does not
                lines.append(("tone", p["level_dbfs"], p["lines"], "; ".join(p["faults"])))
        notes.append(
            f"THD+N vs level: 997 Hz at {len(sweep)} levels, {plan.sweep_s:g} s each; noise "
            "modulation: spread of the A-weighted noise read between the tone's harmonics "
            "(tone and harmonics fitted out, bins near them left out), over the valid levels "
            "from 0 to -90 dBFS at or below the maximum stable amplitude"
        )

    if overload:
        # levels above the stable amplitude overload by design: their gross distortion is the
        # point of this curve (it is no reading to grade); a tone that left no trace or an
        # impossible value shows no number
        def raw(p, k):
            tone = p["tone_dbfs"]
            gone = tone is None or not tone > NUMERIC_FLOOR_DBFS
            if k == "tone_dbfs":
                return np.nan if gone else tone
            if k == "thd_n_db" and (gone or "impossible" in p.get("reason", "")):
                return np.nan
            return p[k]

        pts = sorted(sweep + overload, key=lambda p: p["level_dbfs"])
        curves["overload"] = {
            k: np.array([raw(p, k) for p in pts], dtype=float)
            for k in ("level_dbfs", "tone_dbfs", "thd_n_db", "overload_count")
        }

    if fsweep:
        _assemble_frequency_sweep(fsweep, metrics, curves, notes, invalid, plan)

    if dc:
        dc.sort(key=lambda d: d[0])
        for off, found, faults in dc:
            lines.append(("dc", off, found, faults))
        curves["idle_tone_map"] = {
            "dc_offset": np.array([d[0] for d in dc]),
            "line_dbfs": np.array([np.nan if d[1][0] is None else d[1][0] for d in dc]),
            "line_hz": np.array([np.nan if d[1][1] is None else d[1][1] for d in dc]),
            "detection_limit_dbfs": np.array([d[1][2] for d in dc]),
            "weakest_detectable_dbfs": np.array([d[1][3] for d in dc]),
        }
        notes.append(
            f"idle tones: {len(dc)} DC offsets from {plan.dc_range[0]:g} to "
            f"{plan.dc_range[1]:g} of full scale (both signs), {plan.dc_s:g} s each"
        )
    if lines:
        found = [entry[2][0] for entry in lines if entry[2][0] is not None]
        limits = [entry[2][2] for entry in lines]
        metrics["idle_tone_max_dbfs"] = max(found) if found else max(limits)
        metrics["idle_tone_count"] = len(found)
        notes.append(
            f"idle tones searched in {len(lines)} captures with a battery-wide false-alarm "
            f"probability of {plan.false_alarm:g}"
            + ("" if found else "; none found, so idle_tone_max_dbfs is the detection limit")
        )
        spoilt = [entry for entry in lines if entry[3]]
        if spoilt:
            kind, key, _, why = spoilt[0]
            where = {"silence": "silence", "dc": f"DC offset {key:g}", "tone": f"{key:g} dBFS tone"}
            reason = (
                f"{len(spoilt)} of {len(lines)} captures searched were not valid "
                f"(first: {where[kind]}: {why})"
            )
            invalid["idle_tone_max_dbfs"] = reason
            invalid["idle_tone_count"] = reason

    if stab is not None:
        peaks = [np.max(np.asarray(stab["msa_state_peak"], dtype=float), initial=0.0)]
    else:
        peaks = []
    count = 0
    dropped = stretched = 0
    for st, c, peak in stats:
        dropped += int(st.dropped_pulses[c])
        stretched += int(st.stretched_pulses[c])
        if peak <= msa_amp * (1 + 1e-9):
            count += int(st.overload_count[c])
            peaks.append(float(np.max(st.state_peak[c], initial=0.0)))
    if stats:
        metrics["overload_count"] = count
        metrics["state_peak_max"] = max(peaks) if peaks else None
        pwm = profile.output.kind == "pwm"
        metrics["pwm_dropped_pulses"] = dropped if pwm else None
        metrics["pwm_stretched_pulses"] = stretched if pwm else None
    floored = [
        k
        for k in _FLOORED_METRICS
        if metrics.get(k) is not None and metrics[k] < NUMERIC_FLOOR_DBFS
    ]
    for k in floored:
        metrics[k] = NUMERIC_FLOOR_DBFS
    if floored:
        notes.append(
            f"{', '.join(floored)}: the output was digitally silent (below the simulation's "
            f"numeric floor); reported as {NUMERIC_FLOOR_DBFS:g} dBFS"
        )
    _impossible(metrics, invalid, floor)
    from audiodsm.evaluate.battery_impairments import assemble_impairments

    assemble_impairments(results, metrics, curves, notes, invalid)
    if stab is not None and not msa_amp > 0.0:
        why = "the loop has no stable amplitude: it overloads at every amplitude probed"
        for k in metrics:
            if k not in _UNSTABLE_STILL_VALID:
                invalid.setdefault(k, why)
    for k in invalid:
        if k in metrics:
            metrics[k] = None
    from audiodsm.evaluate.battery import METRIC_UNITS  # the battery imports this module

    ordered = {k: plain_scalar(metrics[k], finite_only=False) for k in METRIC_UNITS if k in metrics}
    invalid = {k: invalid[k] for k in ordered if k in invalid}
    return ordered, curves, notes, invalid


def _assemble_frequency_sweep(points, metrics, curves, notes, invalid, plan):
    """THD+N against frequency: the curve (levels x frequencies) and the worst per level."""
    levels = sorted({p["level_dbfs"] for p in points}, reverse=True)
    freqs = sorted({p["frequency_hz"] for p in points})
    grid = np.full((len(levels), len(freqs)), np.nan)
    reasons = np.full((len(levels), len(freqs)), "", dtype=object)
    for p in points:
        i, j = levels.index(p["level_dbfs"]), freqs.index(p["frequency_hz"])
        reasons[i, j] = p["reason"]
        v = p["thd_n_db"]
        if not p["reason"] and v is not None and math.isfinite(v):
            grid[i, j] = v  # a curve never carries a reading the battery calls invalid
    curves["thd_n_vs_frequency"] = {
        "frequency_hz": np.array(freqs),
        "level_dbfs": np.array(levels),
        "thd_n_db": grid,
        "invalid_reason": reasons.astype(str),
    }
    for lv, name in ((-1.0, "minus1"), (-20.0, "minus20")):
        if lv not in levels:
            continue
        i = levels.index(lv)
        metric = f"thd_n_db_worst_over_frequency_at_{name}_dbfs"
        bad = [(freqs[j], reasons[i, j]) for j in range(len(freqs)) if reasons[i, j]]
        metrics[metric] = float(np.nanmax(grid[i])) if np.isfinite(grid[i]).any() else None
        if bad:
            invalid[metric] = f"{len(bad)} of {len(freqs)} tones invalid (first: {bad[0][1]})"
    notes.append(
        f"THD+N vs frequency: {len(freqs)} tones ("
        + (
            "1/3-octave centres"
            if plan.frequency_sweep_step == 1
            else f"one in {plan.frequency_sweep_step} of the 1/3-octave centres"
        )
        + ", 20 Hz..20 kHz) at "
        + ", ".join(f"{v:g}" for v in levels)
        + f" dBFS, {plan.frequency_sweep_s:g} s each after {plan.settle_s:g} s settling, "
        "fundamental removed by a 3-parameter fit, 20 Hz..20 kHz"
    )


#: Readings that describe the failure itself and stay valid when the loop has no stable
#: amplitude: where the tone was lost, where the guard first acted, the counts.
_UNSTABLE_STILL_VALID = (
    "tone_lost_at_dbfs",
    "overload_onset_dbfs",
    "overload_count",
    "pwm_dropped_pulses",
    "pwm_stretched_pulses",
)


def _impossible(metrics, invalid, floor):
    """Mark the noise readings the chain cannot produce as invalid.

    Impossible: below the simulation's numeric floor, or more than ``_FLOOR_MARGIN_DB`` below
    the loop's linear-model noise floor (for a dynamic range: that far above what it allows).
    """
    checks = [("out_of_band_noise_dbfs", None, "noise")]
    checks += [
        (f"dynamic_range_db{s}", w, "range")
        for w, s in zip(_WEIGHTINGS, ("", "_a", "_ccir"), strict=True)
    ]
    for k, w, kind in checks:
        v = metrics.get(k)
        if v is None or k in invalid or not isinstance(v, (int, float)):
            continue
        if not math.isfinite(v):
            invalid[k] = f"reading is {v}"
            continue
        noise = -v if kind == "range" else v
        if noise < NUMERIC_FLOOR_DBFS and k not in _FLOORED_METRICS:
            invalid[k] = (
                f"impossible: {noise:.1f} dBFS of noise lies below the simulation's numeric "
                f"floor ({NUMERIC_FLOOR_DBFS:g} dBFS)"
            )
        elif w is not None and floor is not None and noise < floor[w] - _FLOOR_MARGIN_DB:
            invalid[k] = (
                f"impossible: the noise ({noise:.1f} dBFS) lies more than {_FLOOR_MARGIN_DB:g} "
                f"dB below the chain's own noise floor ({floor[w]:.1f} dBFS)"
            )
