"""The test battery: AES17-practice measurements of one profile's whole chain.

:func:`run_battery` synthesizes the stimuli of an AES17-style converter test at the profile's
audio rate, runs each through the profile's complete chain (upsampler, modulator, output stage,
reconstruction filter, listening decimator; :func:`audiodsm.stages.chain.run_chain`) and
measures the reconstructed output with :mod:`audiodsm.measure`. The result is a frozen
:class:`BatteryResult` holding a flat dict of metrics (stable snake_case names, the unit in the
name) and the curves behind them (arrays for plots).

The tests
---------
``dynamic_range``
    A -60 dBFS 997 Hz tone; the fundamental is removed by a least-squares sine fit and the
    band-limited (20 Hz .. 20 kHz) residual is read unweighted, A-weighted and CCIR-RMS
    (AES17 -60 dBFS method). The same run's output at the modulator rate gives the
    out-of-band noise after the reconstruction filter and the output spectrum.
``level_sweep``
    997 Hz tones from 0 to -100 dBFS: THD+N against level (unweighted and A-weighted), THD+N
    at -1 and -20 dBFS, the A-weighted noise floor against level (noise modulation, read over
    the levels at or below the maximum stable amplitude, 0 .. -90 dBFS), idle tones under the
    low-level tones (-60 dBFS and below) and the overload onset.
``idle``
    Digital silence: idle-channel noise (unweighted, A, CCIR-RMS), idle tones, and for PWM
    stages the switching rate at idle.
``dc_sweep``
    Small DC offsets, log-spaced, both signs: the strongest in-band line at each offset (the
    idle-tone map).
``stability``
    The maximum stable amplitude of the profile's modulator (bisection on a sine, no guard
    action and no collapse of the SQNR), the integrator state histograms at that amplitude,
    and a few tones above it through the whole chain (the overload behaviour).
``frequency_response``
    A Schroeder-phase multitone on the 1/3-octave centres from 20 Hz to 20 kHz plus 997 Hz:
    the response of the whole chain relative to 997 Hz and its peak-to-peak ripple.
``thd_n_vs_frequency``
    Tones on the 1/3-octave centres from 20 Hz to 20 kHz (997 Hz in place of 1 kHz) at
    -1 and -20 dBFS: THD+N against frequency (a PWM stage's distortion grows with the tone
    frequency, which 997 Hz alone understates) and its worst value over frequency.
``images``
    An in-band tone at ``image_tone_hz``; its image at ``rate - image_tone_hz`` is read on the
    reconstructed output at the modulator rate (AES17 practice for DAC images).
``intermodulation``
    SMPTE (60 Hz + 7 kHz, 4:1) and difference-frequency (19 + 20 kHz, 1:1) twin tones.
``element_mismatch``
    For NRZ outputs with mismatched unit elements: the -1 dBFS THD+N and -60 dBFS dynamic
    range as built and with ideal elements, same dither (what the mismatch costs).
``jitter_sweep``
    The -60 dBFS dynamic range with 1, 10 and 100 ps rms of white jitter on the output edges
    (PDM and NRZ). Both are in :mod:`audiodsm.evaluate.battery_impairments`.

Every test's durations are set by a :class:`BatteryPlan`. The default plan keeps the battery of
a 5th-order single-bit 64x profile within about 20 s on two cores; its resolution is stated in
``BatteryResult.notes`` and in docs/battery.md.

Determinism: each run's dither stream is derived from the profile's ``modulator.seed``, the
``seed`` argument and the run's index, so results do not depend on how the runs are scheduled.
"""

from __future__ import annotations

import concurrent.futures as _cf
import math
import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.evaluate._plain import plain_scalar
from audiodsm.evaluate.battery_assembly import _assemble
from audiodsm.evaluate.battery_impairments import (
    _test_jitter,
    _test_mismatch,
    jitter_scales_linearly,
)
from audiodsm.evaluate.battery_runs import (
    _db,
    _response_frequencies,
    _run_seed,
    _take_modulator_samples,
    _test_class_d_stage,
    _test_dc,
    _test_dynamic_range,
    _test_frequency_sweep,
    _test_idle,
    _test_images,
    _test_imd,
    _test_level_sweep,
    _test_overload,
    _test_response,
    _test_stability,
)
from audiodsm.profile import AUDIO_RATES_HZ, ChainProfile
from audiodsm.profile_text import profile_digest

__all__ = [
    "DEFAULT_RATE_HZ",
    "TEST_NAMES",
    "METRIC_UNITS",
    "BatteryPlan",
    "BatteryResult",
    "battery_rate_hz",
    "run_battery",
    "validity_table",
]

#: Audio rate of the battery when the profile does not set ``listening.rate_hz``.
DEFAULT_RATE_HZ = 48000

#: The tests of a battery, in the order they are listed.
TEST_NAMES = (
    "dynamic_range",
    "level_sweep",
    "idle",
    "dc_sweep",
    "stability",
    "frequency_response",
    "thd_n_vs_frequency",
    "images",
    "intermodulation",
    "element_mismatch",
    "jitter_sweep",
    "class_d_stage",
)

#: Every metric name, the test that produces it, and a short plain description with unit.
METRIC_UNITS = {
    "dynamic_range_db": ("dynamic_range", "dB", "dynamic range, unweighted (-60 dBFS method)"),
    "dynamic_range_db_a": ("dynamic_range", "dB", "dynamic range, A-weighted"),
    "dynamic_range_db_ccir": ("dynamic_range", "dB", "dynamic range, CCIR-RMS weighted"),
    "out_of_band_noise_dbfs": (
        "dynamic_range",
        "dBFS",
        "noise after the reconstruction filter, 20 kHz to the set upper frequency",
    ),
    "carrier_ripple_dbfs": (
        "dynamic_range",
        "dBFS",
        "rms of the output's ripple inside each modulator frame (the PWM carrier after the "
        "filter), which the frame-rate output cannot carry",
    ),
    "jitter_noise_dbfs_at_1ps": (
        "dynamic_range",
        "dBFS",
        "in-band noise 1 ps rms of white clock jitter adds, from the output's mean squared "
        "step (PDM, NRZ; PWM: of its edges; scales as 20 log10 of the jitter)",
    ),
    "output_step_rms_fs": (
        "dynamic_range",
        "FS",
        "rms step between successive output samples (full-scale units; PWM: of a frame's "
        "edges); the jitter noise goes with its square",
    ),
    "jitter_dynamic_range_db_at_1ps": (
        "jitter_sweep",
        "dB",
        "dynamic range (unweighted, -60 dBFS) with 1 ps rms white jitter on the output edges",
    ),
    "jitter_dynamic_range_db_at_10ps": (
        "jitter_sweep",
        "dB",
        "dynamic range (unweighted, -60 dBFS) with 10 ps rms white jitter on the output edges",
    ),
    "jitter_dynamic_range_db_at_100ps": (
        "jitter_sweep",
        "dB",
        "dynamic range (unweighted, -60 dBFS) with 100 ps rms white jitter on the output edges",
    ),
    "analog_noise_dbfs": (
        "dynamic_range",
        "dBFS",
        "in-band noise of the analog noise floor alone (density^2 x 20 Hz..20 kHz), unweighted "
        "(none without a noise density)",
    ),
    "analog_noise_dbfs_a": (
        "dynamic_range",
        "dBFS",
        "in-band noise of the analog noise floor alone, A-weighted",
    ),
    "mismatch_free_thd_n_db_at_minus1_dbfs": (
        "element_mismatch",
        "dB",
        "THD+N at -1 dBFS with ideal unit elements (NRZ with element mismatch only)",
    ),
    "mismatch_free_dynamic_range_db_a": (
        "element_mismatch",
        "dB",
        "A-weighted dynamic range with ideal unit elements (NRZ with element mismatch only)",
    ),
    "mismatch_thd_n_cost_db": (
        "element_mismatch",
        "dB",
        "how much the unit elements' mismatch raises the -1 dBFS THD+N (same dither)",
    ),
    "mismatch_dynamic_range_cost_db": (
        "element_mismatch",
        "dB",
        "how much the unit elements' mismatch lowers the A-weighted dynamic range (same dither)",
    ),
    "thd_n_db_at_minus1_dbfs": ("level_sweep", "dB", "THD+N at -1 dBFS"),
    "thd_n_db_a_at_minus1_dbfs": ("level_sweep", "dB", "THD+N at -1 dBFS, A-weighted"),
    "thd_n_db_at_minus20_dbfs": ("level_sweep", "dB", "THD+N at -20 dBFS"),
    "thd_n_db_a_at_minus20_dbfs": ("level_sweep", "dB", "THD+N at -20 dBFS, A-weighted"),
    "noise_modulation_db": (
        "level_sweep",
        "dB",
        "spread over tone levels of the A-weighted noise between the tone's harmonics",
    ),
    "tone_lost_at_dbfs": (
        "level_sweep",
        "dBFS",
        "highest sweep level at which the 997 Hz tone came out more than 3 dB off (none: null)",
    ),
    "overload_onset_dbfs": (
        "level_sweep",
        "dBFS",
        "lowest 997 Hz tone level at which the loop overloaded: its guard acted or a "
        "multi-level quantizer clipped (none: null)",
    ),
    "idle_noise_dbfs": ("idle", "dBFS", "idle-channel noise, unweighted"),
    "idle_noise_dbfs_a": ("idle", "dBFS", "idle-channel noise, A-weighted"),
    "idle_noise_dbfs_ccir": ("idle", "dBFS", "idle-channel noise, CCIR-RMS weighted"),
    "switching_rate_hz": ("idle", "Hz", "output level changes per second at idle"),
    "dc_offset_dbfs": (
        "idle",
        "dBFS",
        "DC at the output during silence (a DC of full-scale value reads +3.01 dBFS)",
    ),
    "dc_offset_fs": (
        "idle",
        "FS",
        "DC at the output during silence, signed, as a fraction of full scale",
    ),
    "idle_tone_max_dbfs": (
        "idle",
        "dBFS",
        "strongest in-band line over silence, DC offsets and low-level tones "
        "(detection limit when none is found)",
    ),
    "idle_tone_count": ("idle", "", "captures in which an in-band line was found"),
    "max_stable_amplitude_dbfs": ("stability", "dBFS", "largest stable sine amplitude"),
    "state_peak_max": (
        "stability",
        "",
        "largest integrator state magnitude at or below the maximum stable amplitude",
    ),
    "passband_ripple_db": (
        "frequency_response",
        "dB",
        "peak-to-peak response of the whole chain, 20 Hz .. 20 kHz",
    ),
    "thd_n_db_worst_over_frequency_at_minus1_dbfs": (
        "thd_n_vs_frequency",
        "dB",
        "highest THD+N of a -1 dBFS tone over the 1/3-octave centres, 20 Hz .. 20 kHz",
    ),
    "thd_n_db_worst_over_frequency_at_minus20_dbfs": (
        "thd_n_vs_frequency",
        "dB",
        "highest THD+N of a -20 dBFS tone over the 1/3-octave centres, 20 Hz .. 20 kHz",
    ),
    "image_rejection_db": ("images", "dB", "in-band tone over its image at rate - f"),
    "image_rejection_noise_limited": (
        "images",
        "",
        "true when the image is below the noise and the rejection is a lower bound",
    ),
    "imd_smpte_db": ("intermodulation", "dB", "SMPTE IMD (60 Hz + 7 kHz, 4:1)"),
    "imd_difference_db": ("intermodulation", "dB", "difference-frequency IMD (19 + 20 kHz)"),
    "supply_ripple_sideband_db": (
        "class_d_stage",
        "dB",
        "supply rejection: the stronger sideband the supply ripple puts beside a -1 dBFS "
        "997 Hz tone, re the tone (class-D with a supply ripple)",
    ),
    "output_peak_volts": (
        "class_d_stage",
        "V",
        "peak load voltage at -1 dBFS, 997 Hz (class-D with an LC filter)",
    ),
    "load_current_peak_amperes": (
        "class_d_stage",
        "A",
        "peak load current at -1 dBFS, 997 Hz",
    ),
    "inductor_current_peak_amperes": (
        "class_d_stage",
        "A",
        "peak filter-inductor current (load current plus carrier ripple) at -1 dBFS, 997 Hz",
    ),
    "switch_conduction_watts": (
        "class_d_stage",
        "W",
        "conduction loss in the switches' on-resistance (I^2 R, averaged) at -1 dBFS, 997 Hz",
    ),
    "load_power_watts": (
        "class_d_stage",
        "W",
        "mean power into the load at -1 dBFS, 997 Hz",
    ),
    "overload_count": (
        "",
        "",
        "overload samples (guard actions, multi-level quantizer clipping) in runs at or below "
        "the maximum stable amplitude",
    ),
    "pwm_dropped_pulses": ("", "", "PWM pulses dropped for the minimum width (PWM only)"),
    "pwm_stretched_pulses": ("", "", "PWM pulses stretched to the minimum width (PWM only)"),
}

#: Shortest capture the idle-tone detector accepts (12 Hz bins, 8 averages; idle_tones.py).
_MIN_SEARCH_S = 0.4


@dataclass(frozen=True)
class BatteryPlan:
    """Durations, levels and resolutions of the battery's tests.

    Every duration is the measured stretch; ``settle_s`` of settling is added in front of
    each stimulus and excluded from the readings.

    Attributes
    ----------
    settle_s : float
        Settling time before every measured stretch.
    tone_s : float
        The -60 dBFS dynamic-range tone.
    sweep_levels_dbfs : tuple of float
        Levels of the THD+N-versus-level sweep (997 Hz).
    sweep_s : float
        Each sweep point.
    silence_s : float
        Digital silence.
    dc_offsets : int
        DC offsets per sign, log-spaced over ``dc_range``.
    dc_range : (float, float)
        Smallest and largest DC offset magnitude, in full-scale units.
    dc_s : float
        Each DC offset.
    response_s : float
        The frequency-response multitone.
    response_level_dbfs : float
        Peak level of the multitone.
    frequency_sweep_levels_dbfs : tuple of float
        Tone levels of the THD+N-against-frequency sweep; -1 and -20 dBFS give its metrics.
    frequency_sweep_s : float
        Each tone of that sweep (short: the 1/3-octave centres make 31 tones per level).
    frequency_sweep_step : int
        Every how many of the 1/3-octave centres the sweep takes a tone (1: every centre;
        2: every second, a 2/3-octave grid). The top frequency (20 kHz) and 997 Hz are
        always in.
    image_tone_hz : float
        In-band tone of the image test.
    image_s : float
        The image test.
    composite_level_dbfs : float
        Peak level of the image tone and of both twin tones (combined peak).
    imd_s : float
        Each twin tone.
    out_of_band_upper_hz : float
        Upper edge of the out-of-band noise band (capped at half the modulator rate).
    stability_samples : int
        Modulator samples per run of the stability search (at least 2**20 for the battery's
        own plans; see :meth:`~audiodsm.stages.modulator.Modulator.probe_stability`).
    overload_steps_db : tuple of float
        Levels above the maximum stable amplitude (dB) probed through the whole chain.
    histogram_samples : int
        Modulator samples traced for the state histograms.
    histogram_bins : int
        Bins per integrator histogram.
    false_alarm : float
        Probability that noise alone triggers a line anywhere in the battery (shared out over
        all the captures searched for idle tones).
    jitter_sigmas_s : tuple of float
        White edge jitter (rms, seconds) of the dynamic-range-against-jitter runs; 1, 10 and
        100 ps give the ``jitter_dynamic_range_db_at_*`` metrics.
    """

    settle_s: float = 0.1
    tone_s: float = 1.0
    sweep_levels_dbfs: tuple = (0.0, -1.0, -10.0, -20.0, -30.0, -40.0, -50.0, -60.0, -70.0,
                                -80.0, -90.0, -100.0)  # fmt: skip
    sweep_s: float = 0.5
    silence_s: float = 2.0
    dc_offsets: int = 40
    dc_range: tuple = (1e-6, 1e-2)
    dc_s: float = 0.4
    response_s: float = 0.5
    response_level_dbfs: float = -6.0
    frequency_sweep_levels_dbfs: tuple = (-1.0, -20.0)
    frequency_sweep_s: float = 0.1
    frequency_sweep_step: int = 1
    image_tone_hz: float = 17000.0
    image_s: float = 0.5
    composite_level_dbfs: float = -6.0
    imd_s: float = 1.0
    out_of_band_upper_hz: float = 500000.0
    stability_samples: int = 1 << 20
    overload_steps_db: tuple = (0.5, 1.0, 2.0, 3.0, 6.0)
    histogram_samples: int = 1 << 17
    histogram_bins: int = 64
    false_alarm: float = 0.01
    jitter_sigmas_s: tuple = (1e-12, 1e-11, 1e-10)

    @classmethod
    def quick(cls) -> BatteryPlan:
        """A short plan for tests and previews: fewer points, shorter captures."""
        return cls(
            tone_s=0.5,
            sweep_levels_dbfs=(0.0, -1.0, -20.0, -40.0, -60.0, -80.0, -100.0),
            sweep_s=0.4,
            silence_s=0.4,
            dc_offsets=4,
            dc_s=0.4,
            response_s=0.4,
            frequency_sweep_s=0.1,
            frequency_sweep_step=2,  # a 2/3-octave grid: the sweep was half the short plan
            image_s=0.3,
            imd_s=0.4,
            stability_samples=1 << 20,  # long runs even in a preview: see probe_stability
            overload_steps_db=(1.0, 3.0),
            histogram_samples=1 << 15,
        )

    def check(self) -> BatteryPlan:
        """Validate the plan; return it unchanged or raise :class:`ParameterError`."""
        for name in ("settle_s", "tone_s", "sweep_s", "silence_s", "dc_s", "response_s"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and 0.0 < v <= 60.0):
                raise ParameterError(f"plan.{name}", v, "a duration in seconds, above 0, <= 60")
        for name in ("sweep_s", "silence_s", "dc_s"):
            if getattr(self, name) < _MIN_SEARCH_S:
                raise ParameterError(
                    f"plan.{name}",
                    getattr(self, name),
                    f"at least {_MIN_SEARCH_S} s (the idle-tone search needs 12 Hz bins "
                    "averaged 8 times)",
                )
        for name in ("image_s", "imd_s", "frequency_sweep_s"):
            v = getattr(self, name)
            if not (math.isfinite(v) and 0.05 <= v <= 60.0):
                raise ParameterError(f"plan.{name}", v, "a duration from 0.05 to 60 s")
        if not self.sweep_levels_dbfs or any(
            not (-160.0 <= float(v) <= 0.0) for v in self.sweep_levels_dbfs
        ):
            raise ParameterError(
                "plan.sweep_levels_dbfs", self.sweep_levels_dbfs, "levels from -160 to 0 dBFS"
            )
        step = self.frequency_sweep_step
        if isinstance(step, bool) or not isinstance(step, (int, np.integer)) or not 1 <= step <= 8:
            raise ParameterError("plan.frequency_sweep_step", step, "an integer from 1 to 8")
        if not self.frequency_sweep_levels_dbfs or any(
            not (-160.0 <= float(v) <= 0.0) for v in self.frequency_sweep_levels_dbfs
        ):
            raise ParameterError(
                "plan.frequency_sweep_levels_dbfs",
                self.frequency_sweep_levels_dbfs,
                "levels from -160 to 0 dBFS",
            )
        lo, hi = self.dc_range
        if not (0.0 < lo <= hi < 1.0) or not (0 <= self.dc_offsets <= 400):
            raise ParameterError(
                "plan.dc_range", self.dc_range, "0 < low <= high < 1 and 0..400 offsets per sign"
            )
        if not (0.0 < self.false_alarm < 0.5):
            raise ParameterError("plan.false_alarm", self.false_alarm, "a probability in (0, 0.5)")
        for name in ("response_level_dbfs", "composite_level_dbfs"):
            v = getattr(self, name)
            if not (-60.0 <= v <= 0.0):
                raise ParameterError(f"plan.{name}", v, "a level from -60 to 0 dBFS")
        if not (float(self.image_tone_hz).is_integer() and 20.0 <= self.image_tone_hz <= 20000.0):
            raise ParameterError(
                "plan.image_tone_hz", self.image_tone_hz, "a whole number of Hz, 20 to 20000"
            )
        if not self.jitter_sigmas_s or any(
            isinstance(v, bool) or not (0.0 < float(v) <= 1e-8) for v in self.jitter_sigmas_s
        ):
            raise ParameterError(
                "plan.jitter_sigmas_s", self.jitter_sigmas_s, "jitter from 0 to 10 ns (seconds)"
            )
        if not (self.histogram_bins >= 4 and self.histogram_samples >= 1024):
            raise ParameterError(
                "plan.histogram_bins", self.histogram_bins, ">= 4 bins over >= 1024 samples"
            )
        return self


@dataclass(frozen=True)
class BatteryResult:
    """What :func:`run_battery` measured for one profile.

    Attributes
    ----------
    profile_name : str
    digest : str
        :func:`~audiodsm.profile_text.profile_digest` of the profile measured.
    rate_hz : int
        Audio rate of the stimuli.
    metrics : dict
        Metric name -> float, int, bool or None (None when a reading does not exist, e.g. the
        dynamic range of a loop too unstable to pass a -60 dBFS tone, and for every invalid
        reading); names in :data:`METRIC_UNITS`.
    curves : dict
        Curve name -> dict of numpy arrays (see docs/battery.md).
    notes : tuple of str
        Resolution of each test, and anything that made a reading doubtful.
    seconds : float
        Wall-clock time of the battery.
    plan : BatteryPlan
    run_seconds : dict
        Test label -> seconds its runs took (summed over runs; they overlap in parallel).
    invalid : dict
        Metric name -> why its reading is invalid (the loop overloaded, the tone was lost, the
        output clipped, the value is impossible, ...). Those metrics read None in
        ``metrics``; every metric not named here is valid.
    modulator_samples : int
        Modulator samples the battery simulated, every channel counted: each chain run's
        input frames (settling and tail included) times the OSR, plus the state trace. The
        stability search is design work read from the loop cache (docs/loops.md) and is not
        counted. 0 in results written before this count existed.
    """

    profile_name: str
    digest: str
    rate_hz: int
    metrics: dict
    curves: dict = field(repr=False)
    notes: tuple
    seconds: float
    plan: BatteryPlan = field(repr=False)
    run_seconds: dict = field(default_factory=dict, repr=False)
    invalid: dict = field(default_factory=dict)
    modulator_samples: int = 0

    def json_metrics(self) -> dict:
        """The metrics with non-finite floats as None (JSON has no inf or NaN)."""
        return {k: plain_scalar(v) for k, v in self.metrics.items()}

    def validity(self) -> dict:
        """Metric name -> ``{"valid": bool, "reason": str}`` for every metric measured."""
        return validity_table(self.metrics, self.invalid)


def validity_table(metrics: dict, invalid: dict) -> dict:
    """Metric name -> ``{"valid": bool, "reason": str}`` (reason empty when valid)."""
    return {k: {"valid": k not in invalid, "reason": str(invalid.get(k, ""))} for k in metrics}


def battery_rate_hz(profile: ChainProfile) -> int:
    """The audio rate the battery uses for a profile: its listening rate, else 48 kHz."""
    return int(profile.listening.rate_hz or DEFAULT_RATE_HZ)


# ---------------------------------------------------------------------------------------------
# The driver
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Context:
    plan: BatteryPlan
    rate: int
    false_alarm: float


def _chunks(seq, size):
    return [seq[i : i + size] for i in range(0, len(seq), size)]


def _dc_offsets(plan):
    if plan.dc_offsets == 0:
        return []
    mags = np.geomspace(plan.dc_range[0], plan.dc_range[1], plan.dc_offsets)
    return [float(s * m) for s in (1.0, -1.0) for m in mags]


def _sweep_frequencies(step):
    """Every ``step``-th frequency of the response grid, 20 kHz and 997 Hz always included."""
    grid = _response_frequencies()
    return sorted({*grid[::step], grid[-1], 997.0})


def _probe_levels(msa, steps_db):
    """Tone levels (dBFS) above the stable amplitude, up to 0 dBFS, for the overload probes."""
    msa_db = _db(msa)
    if not math.isfinite(msa_db):
        return []
    levels = {round(min(0.0, msa_db + d), 3) for d in steps_db}
    return sorted(v for v in levels if v > msa_db)


def run_battery(
    profile: ChainProfile,
    *,
    jobs: int | None = None,
    progress: Callable[[int, int, str], None] | None = None,
    seed: int = 0,
    plan: BatteryPlan | None = None,
    tests=None,
) -> BatteryResult:
    """Run the test battery on one profile's whole chain.

    Parameters
    ----------
    profile : ChainProfile
        The chain to measure.
    jobs : int, optional, keyword-only
        Worker threads (the compiled loops release the GIL). Default: the number of cores.
    progress : callable, optional, keyword-only
        Called as ``progress(done, total, label)`` after each run finishes (from the calling
        thread).
    seed : int, keyword-only
        Mixed with the profile's ``modulator.seed`` and each run's index to seed its dither.
    plan : BatteryPlan, optional, keyword-only
        Durations and levels; default :class:`BatteryPlan()`.
    tests : sequence of str, optional, keyword-only
        A subset of :data:`TEST_NAMES`; default all. Metrics of tests not run are absent.

    Returns
    -------
    BatteryResult

    Raises
    ------
    ParameterError
        A bad argument, or a profile the chain cannot build.

    References
    ----------
    .. [1] AES17-2015, AES standard method for digital audio engineering - Measurement of
       digital audio equipment (dynamic range, THD+N, idle-channel noise, frequency response,
       images; clause numbers from memory).
    .. [2] IEC 60268-3 and SMPTE RP120, intermodulation (from memory).
    .. [3] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", 2005,
       ch. 4 (maximum stable amplitude by simulation).
    """
    start = time.perf_counter()
    if not isinstance(profile, ChainProfile):
        raise ParameterError("profile", type(profile).__name__, "a ChainProfile")
    plan = (plan if plan is not None else BatteryPlan()).check()
    if tests is None:
        tests = TEST_NAMES
    tests = tuple(tests)
    bad = [t for t in tests if t not in TEST_NAMES]
    if bad or not tests:
        raise ParameterError("tests", tests, "names from " + ", ".join(TEST_NAMES))
    if jobs is None:
        jobs = os.cpu_count() or 1
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or jobs < 1:
        raise ParameterError("jobs", jobs, "a positive integer")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ParameterError("seed", seed, "a non-negative integer")
    rate = battery_rate_hz(profile)
    if rate not in AUDIO_RATES_HZ:  # pragma: no cover - the profile schema enforces it
        raise ParameterError("listening.rate_hz", rate, "a supported audio rate")

    dc = _dc_offsets(plan) if "dc_sweep" in tests else []
    sweep_levels = sorted({float(v) for v in plan.sweep_levels_dbfs}, reverse=True)
    low_tone_captures = sum(1 for v in sweep_levels if v <= -60.0)
    searched = ("idle" in tests) + len(dc) + (low_tone_captures if "level_sweep" in tests else 0)
    ctx = _Context(plan, rate, plan.false_alarm / max(1, searched))

    # the runs: (label, function, args); "stability" feeds the overload probes. Each run's
    # dither seed comes from its index; a run that does the work of several (the jitter
    # sweep in one run) takes the first of their indices and leaves the others unused, so
    # the other runs keep their seeds
    runs = []
    unused_indices = {}
    if "stability" in tests:
        runs.append(("stability", _test_stability, ()))
    if "dynamic_range" in tests:
        runs.append(("dynamic range", _test_dynamic_range, ()))
    if "level_sweep" in tests:
        for part in _chunks(sweep_levels, 6):
            runs.append(("THD+N vs level", _test_level_sweep, (part,)))
    if "idle" in tests:
        runs.append(("idle channel", _test_idle, ()))
    for part in _chunks(dc, 8):
        runs.append(("DC offsets", _test_dc, (part,)))
    if "frequency_response" in tests:
        runs.append(("frequency response", _test_response, ()))
    if "thd_n_vs_frequency" in tests:
        tones = [
            (float(lv), f)
            for lv in sorted({float(v) for v in plan.frequency_sweep_levels_dbfs}, reverse=True)
            for f in _sweep_frequencies(plan.frequency_sweep_step)
        ]
        for part in _chunks(tones, 8):
            runs.append(("THD+N vs frequency", _test_frequency_sweep, (part,)))
    if "images" in tests:
        runs.append(("images", _test_images, ()))
    if "intermodulation" in tests:
        runs.append(("intermodulation", _test_imd, ()))
    if "element_mismatch" in tests:
        runs.append(("element mismatch", _test_mismatch, ()))
    if "jitter_sweep" in tests:
        sigmas = sorted({float(v) for v in plan.jitter_sigmas_s})
        if jitter_scales_linearly(profile):  # one chain run serves every jitter
            unused_indices[len(runs)] = len(sigmas) - 1
            runs.append(("DR vs jitter", _test_jitter, (tuple(sigmas),)))
        else:
            for sigma in sigmas:
                runs.append(("DR vs jitter", _test_jitter, (sigma,)))
    if "class_d_stage" in tests:
        runs.append(("class-D stage", _test_class_d_stage, ()))
    total = len(runs) + ("stability" in tests)  # the overload probes follow the stability run
    seed_indices, index = [], 0
    for i in range(len(runs)):
        seed_indices.append(index)
        index += 1 + unused_indices.get(i, 0)

    def with_seed(index):
        s = _run_seed(profile.modulator.seed, seed, index)
        return replace(profile, modulator=replace(profile.modulator, seed=s))

    results = []
    run_seconds = {}
    done = 0
    simulated = 0

    def timed(fn, *args):
        t0 = time.perf_counter()
        _take_modulator_samples()  # this thread's count starts at zero for the run
        out = fn(*args)
        return out, time.perf_counter() - t0, _take_modulator_samples()

    workers = max(1, min(int(jobs), total))
    # One BLAS thread per worker: the runs already fill the cores, and a multi-threaded BLAS
    # inside each (the least-squares fits) oversubscribes them and slows down many times over.
    from threadpoolctl import threadpool_limits

    pool = _cf.ThreadPoolExecutor(max_workers=workers)
    try:
        with threadpool_limits(limits=1, user_api="blas"):
            pending = {}
            for i, (label, fn, args) in enumerate(runs):
                pending[pool.submit(timed, fn, ctx, with_seed(seed_indices[i]), *args)] = label
            while pending:
                finished, _ = _cf.wait(pending, return_when=_cf.FIRST_COMPLETED)
                for fut in finished:
                    label = pending.pop(fut)
                    part, spent, samples = fut.result()
                    run_seconds[label] = run_seconds.get(label, 0.0) + spent
                    simulated += samples
                    results.append(part)
                    done += 1
                    if progress is not None:
                        progress(done, total, label)
                    if label == "stability":
                        probe = _probe_levels(part["msa"], plan.overload_steps_db)
                        fut2 = pool.submit(timed, _test_overload, ctx, with_seed(index), probe)
                        pending[fut2] = "overload"
    finally:
        # on an error or Ctrl-C, runs not yet started are dropped; running ones finish
        pool.shutdown(wait=True, cancel_futures=True)
    metrics, curves, notes, invalid = _assemble(results, tests, plan, profile)
    return BatteryResult(
        profile_name=profile.name,
        digest=profile_digest(profile),
        rate_hz=rate,
        metrics=metrics,
        curves=curves,
        notes=tuple(notes),
        seconds=time.perf_counter() - start,
        plan=plan,
        run_seconds=run_seconds,
        invalid=invalid,
        modulator_samples=int(simulated),
    )
