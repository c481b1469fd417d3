"""The chain driver: a profile becomes a sequence of stages run block by block.

One channel's path is::

    audio block --clip/refuse--> x input_scale (headroom) --> Upsampler --> Modulator
        --> output stage (PDM | NRZ | PWM) --> [semi-digital FIR]
        --> analog reconstruction filter (exact for the waveform)
        --> listening Downsampler --> calibration --> listening samples

Every stage follows ``process(x, state) -> (y, state)`` and gives the same output for any
split of its input into blocks, so the chain does too: :meth:`Chain.process` is a pure
function of the block and a :class:`ChainState` value. Channels are independent and run in
parallel threads (the compiled kernels release the GIL). A block of input frames never turns
into more than about :data:`MAX_BLOCK_MODULATOR_SAMPLES` modulator samples per channel, so
memory stays bounded for any input length; each worker runs its block through the stages in
pieces of :data:`CACHE_PIECE_MODULATOR_SAMPLES`, which stay in the core's cache.

Calibration: the chain's static transfer (the headroom factor, the output stage's volts per
full-scale unit and its offset, the loop's signal transfer, the semi-digital FIR's gain and
the analog filter's, upsampler's and downsampler's responses at 997 Hz) is computed when the
chain is built and divided out, so a -1 dBFS 997 Hz tone comes out at -1 dBFS (the AES17 level
definition: 0 dBFS is the rms of a full-scale sine). The linear parts are applied where they
cost least: the headroom factor before the upsampler, the calibration after the decimator.

Time alignment: :meth:`Chain.stream` and :func:`run_chain` drop the chain's latency (rounded
to a whole listening sample) from the start and flush the chain with silence at the end, so the
listening output has exactly the duration of the input and lines up with it.
"""

from __future__ import annotations

import functools
import math
import os
import time
from collections.abc import Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import replace
from typing import NamedTuple

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.profile import ChainProfile, ImpairmentSettings
from audiodsm.stages.chain_build import (
    _analog_filter,
    _build_ntf,
    _check_rate,
    _designed_ntf,
    _edge_jitter_and_noise,
    _mean_level,
    _output_waveform_fn,
    _pwm_dead_time_fn,
    _scaled_loop,
    _settings_of,
    _stf_filter,
    _switched_filter_fn,
    _zero_band_edge,
    auto_input_scale,
)
from audiodsm.stages.chain_records import ChainBlock, ChainResult, ChainState, ChainStats

__all__ = [
    "KEEP_CHOICES",
    "MAX_BLOCK_MODULATOR_SAMPLES",
    "CACHE_PIECE_MODULATOR_SAMPLES",
    "STAGE_NAMES",
    "Chain",
    "run_chain",
    "release_worker_threads",
]

#: What :func:`run_chain` can keep: the listening output, the modulator output, the
#: reconstructed (calibrated) output at the modulator rate, the error-only signal, and the part
#: of the listening output the random edge jitter makes (``jitter_error``, see
#: :meth:`Chain.process`).
KEEP_CHOICES = ("listening", "modulator", "analog", "error", "jitter_error")
#: The outputs at the listening rate: aligned and flushed by :meth:`Chain.stream`.
_LISTENING_RATE = ("listening", "error", "jitter_error")

#: The stages whose time :attr:`Chain.stage_seconds` adds up (summed over channels).
STAGE_NAMES = ("upsample", "modulate", "output_stage", "reconstruct", "decimate", "error_path")

#: Upper bound on modulator samples per channel per block handed to a worker thread (sets
#: the memory per block).
MAX_BLOCK_MODULATOR_SAMPLES = 1 << 18

#: Each worker runs its block through the stages in pieces of at most this many modulator
#: samples: a piece (1 MB of float64) stays in the core's cache (2 MB of L2 a core here) from
#: one stage to the next. On this project's 2-core machine 2**16 ran the default chain about
#: 25 % faster than 2**18; 2**17 ran 10 s of stereo through one thread 4-9 % faster than
#: 2**16 (the shipped PDM, the default and the 17-level NRZ profile, issue 12): every piece
#: costs about 0.1 ms of call overhead in the five stages.
CACHE_PIECE_MODULATOR_SAMPLES = 1 << 17

#: The AES17 test frequency, used for calibration.
_CAL_FREQ_HZ = 997.0
#: Most quantizer levels the calibration probes one by one (more: an even spread of them).
_CAL_MAX_LEVELS = 4097
#: Most channels a chain runs.
_MAX_CHANNELS = 8


# ---------------------------------------------------------------------------------------------
# The chain
# ---------------------------------------------------------------------------------------------


class Chain:
    """A profile's stages, built for one input rate and channel count.

    Build it with :meth:`from_profile`. Then either call :meth:`process` block by block (raw,
    latency included), or :meth:`stream` / :func:`run_chain` (latency removed, flushed).

    Attributes
    ----------
    profile : ChainProfile
    rate_hz, modulator_rate_hz, listening_rate_hz : int or float
    channels, osr : int
    gain : float
        Static gain at 997 Hz divided out by the calibration.
    offset : float
        Static output offset (volts, e.g. half the supply of a single-ended PWM stage)
        subtracted before the gain.
    latency_s : float
        Total latency of the chain.
    input_scale : float
        Modulator input for a full-scale input sample (fraction of the quantizer's full
        scale): the profile's ``modulator.input_scale``, or :func:`auto_input_scale`.
    state_scaling_probe : StabilityProbe or None
        With ``modulator.state_scaling`` on: the maximum stable amplitude found for the loop
        and the simulated peak of each scaled state there (None when scaling is off).
    block_frames : int
        Input frames per internal block.
    stage_seconds : dict
        Time spent in each stage of :data:`STAGE_NAMES` so far, summed over channels (a
        running tally for benchmarks; it does not affect results).
    """

    def __init__(self, profile, rate_hz, channels, *, listening_rate_hz=None, threads=None):
        from audiodsm.stages.downsample import Downsampler, design_downsampler
        from audiodsm.stages.filter_design import semi_digital_fir
        from audiodsm.stages.modulator import Modulator
        from audiodsm.stages.upsample import Upsampler, design_upsampler

        if not isinstance(profile, ChainProfile):
            raise ParameterError("profile", type(profile).__name__, "a ChainProfile")
        self.profile = profile
        self.rate_hz = _check_rate(rate_hz)
        if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)):
            raise ParameterError("channels", channels, f"an integer from 1 to {_MAX_CHANNELS}")
        if not 1 <= channels <= _MAX_CHANNELS:
            raise ParameterError("channels", channels, f"an integer from 1 to {_MAX_CHANNELS}")
        self.channels = int(channels)
        if listening_rate_hz is None:
            listening_rate_hz = profile.listening.rate_hz or self.rate_hz
        self.listening_rate_hz = _check_rate(listening_rate_hz, "listening_rate_hz")
        up = profile.upsampler
        self.osr = up.osr
        self.modulator_rate_hz = self.rate_hz * self.osr
        self.block_frames = max(1, MAX_BLOCK_MODULATOR_SAMPLES // self.osr)
        self.piece_frames = max(1, CACHE_PIECE_MODULATOR_SAMPLES // self.osr)
        self.requantizer = None  # the source's word length (input.requantize = "tpdf")
        if profile.input.requantize == "tpdf":
            from audiodsm.stages.source_word import SourceRequantizer

            self.requantizer = SourceRequantizer(
                profile.input.source_bits, seed=profile.input.dither_seed
            )

        with _settings_of(profile, "upsampler"):
            self.upsampler_design = design_upsampler(
                self.rate_hz,
                self.osr,
                passband_edge=up.passband_edge,
                passband_ripple_db=up.passband_ripple_db,
                stopband_edge=up.stopband_edge,
                stopband_atten_db=up.stopband_atten_db,
                final_stage=up.final_stage,
            )
            self._upsampler = Upsampler(self.upsampler_design)
        fp = profile.fixed_point
        if fp.active and fp.interpolator != "float":
            # [fixed_point] interpolator: the integer interpolator (or its last stage) in the
            # signal path; the design, its response and delay stay the float chain's
            with _settings_of(profile, "fixed_point"):
                from audiodsm.stages.fixed_upsample import (
                    FixedPointUpsampler,
                    interpolator_format_from_settings,
                )

                self._upsampler = FixedPointUpsampler(
                    self.upsampler_design,
                    interpolator_format_from_settings(fp),
                    fp.interpolator,
                )

        mod = profile.modulator
        with _settings_of(profile, "modulator"):
            if mod.explicit_ntf:
                self.ntf = _build_ntf(mod)
            else:
                self.ntf = _designed_ntf(
                    mod.order,
                    self.osr,
                    mod.out_of_band_gain,
                    mod.zero_layout,
                    _zero_band_edge(mod.zero_band_edge_hz, self.rate_hz, self.modulator_rate_hz),
                )
            mod_kwargs = {
                "structure": mod.structure,
                "levels": mod.levels,
                "dither_lsb": mod.dither_lsb,
                "seed": mod.seed,
                "guard": mod.guard,
            }
            if mod.input_feed_in:
                mod_kwargs["input_feed_in"] = True
            loop, self.state_scaling_probe = _scaled_loop(
                self.ntf, mod_kwargs, self.osr, mod.state_scaling, mod.state_peak_bound
            )
            if mod.state_bound:
                mod_kwargs["state_bound"] = mod.state_bound
            self.modulator = Modulator(loop, **mod_kwargs)
            self.input_scale = mod.input_scale or auto_input_scale(
                self.ntf, mod.levels, mod.dither_lsb
            )
            # [fixed_point]: the signal path runs the bit-true integer loop built from the
            # same (scaled) realization; self.modulator stays the float reference
            self.fixed_loop = None
            signal_loop = self.modulator.loop
        if profile.fixed_point.active:
            with _settings_of(profile, "fixed_point"):
                from audiodsm.stages.fixed_loop import FixedPointModulator, format_from_settings

                self.fixed_loop = FixedPointModulator(
                    self.modulator.loop,
                    format_from_settings(profile.fixed_point),
                    mod.levels,
                    dither_lsb=mod.dither_lsb,
                    seed=mod.seed,
                )
                signal_loop = self.fixed_loop.quantized_loop
        with _settings_of(profile, "modulator"):
            self._loop_space = signal_loop.linearized()

        with _settings_of(profile, "reconstruction"):
            taps = profile.reconstruction.fir_taps
            self.fir = semi_digital_fir(np.asarray(taps, dtype=float)) if taps else None
            self.analog_filter = _analog_filter(profile)
        with _settings_of(profile, "output"):
            # Dead time follows the LC filter's inductor current, so that output stage runs
            # together with the filter. The plain stage (without dead time) is what the
            # calibration reads: the dead-time error is the product's, and stays in the output.
            out = profile.output
            self._pwm_dead_time = None
            if out.kind == "pwm" and out.dead_time_ticks > 0:
                plain = replace(profile, output=replace(out, dead_time_ticks=0))
                self._pwm_dead_time = _pwm_dead_time_fn(
                    profile, float(self.modulator_rate_hz), self.analog_filter
                )
            else:
                plain = profile
            self._waveform = _output_waveform_fn(plain, float(self.modulator_rate_hz))
            # the calibration reads the ideal stage: the impairments' errors stay in the output
            ideal = ImpairmentSettings(return_to_zero=plain.impairments.return_to_zero)
            self._ideal_stage = _output_waveform_fn(
                replace(plain, impairments=ideal), float(self.modulator_rate_hz)
            )
        with _settings_of(profile, "listening"):
            listen = profile.listening
            if listen.decimator == "counting":  # same interface as the half-band cascade
                from audiodsm.stages.counting import (
                    CountingDownsampler,
                    design_counting_downsampler,
                )

                self.downsampler_design = design_counting_downsampler(
                    self.modulator_rate_hz,
                    self.listening_rate_hz,
                    length=listen.counting_length,
                    stages=listen.counting_stages,
                    passband_hz=listen.passband_hz,
                )
                self._downsampler = CountingDownsampler(self.downsampler_design)
            else:
                self.downsampler_design = design_downsampler(
                    self.modulator_rate_hz, self.listening_rate_hz, passband_hz=listen.passband_hz
                )
                self._downsampler = Downsampler(self.downsampler_design)
        with _settings_of(profile, "output"):
            self._calibrate()  # runs the output stage on its levels
        with _settings_of(profile, "impairments"):
            self._jitter, self._noise = _edge_jitter_and_noise(profile, self.modulator_rate_hz)
        imp = profile.impairments
        self._supply_ripple = None
        if imp.supply_ripple > 0.0:
            self._supply_ripple = {"ripple": imp.supply_ripple, "ripple_hz": imp.supply_ripple_hz}
        self._switched = None  # on-resistance that follows the switch state (no dead time)
        if self._pwm_dead_time is None:
            with _settings_of(profile, "impairments"):
                self._switched = _switched_filter_fn(profile, float(self.modulator_rate_hz))
        if self._jitter is not None:  # an early edge changes the frame before it
            self.latency_s += 1.0 / self.modulator_rate_hz
        # keep="jitter_error": the same edge stage with its random jitter taken out
        self._steady_edges = None
        if self._jitter is not None and self._jitter.rms_s > 0.0:
            self._steady_edges = self._jitter.without_random_jitter()
        self.stage_seconds = dict.fromkeys(STAGE_NAMES, 0.0)
        n_threads = threads if threads is not None else min(self.channels, os.cpu_count() or 1)
        self._threads = max(1, int(n_threads))

    @classmethod
    def from_profile(cls, profile, rate_hz, channels, *, listening_rate_hz=None, threads=None):
        """Build the chain of ``profile`` for input at ``rate_hz`` with ``channels`` channels.

        Parameters
        ----------
        profile : ChainProfile
        rate_hz : int
            Input (audio) rate, one of :data:`~audiodsm.profile.AUDIO_RATES_HZ`.
        channels : int
            1 to 8.
        listening_rate_hz : int, optional
            Rate of the listening output; default: the profile's ``listening.rate_hz``, or
            the input rate when that is 0.
        threads : int, optional
            Worker threads for the channels; default ``min(channels, cpu_count)``.

        Returns
        -------
        Chain

        Raises
        ------
        ParameterError
            An unsupported rate or channel count, or a stage that rejects a setting.
        """
        return cls(profile, rate_hz, channels, listening_rate_hz=listening_rate_hz, threads=threads)

    # -- calibration ---------------------------------------------------------------------------

    def _calibrate(self) -> None:
        """Compute the static offset, the 997 Hz gain and the latency of the chain."""
        levels = self.profile.modulator.levels
        if levels <= _CAL_MAX_LEVELS:
            probe = np.linspace(-1.0, 1.0, levels)
        else:  # a fine quantizer (up to 24 bits): a spread of its exact levels is enough
            codes = np.unique(np.round(np.linspace(0.0, levels - 1.0, _CAL_MAX_LEVELS)))
            probe = codes * (2.0 / (levels - 1)) - 1.0
        # each level held for a few frames, so edge effects between frames settle; the last
        # frame of each run is the stage's steady output for that level. The stage probed has
        # no dead time (see __init__): the error dead time makes depends on the load current,
        # it is the product's offset and distortion, and the measurements must show it.
        hold = 4
        wf, _, _ = self._ideal_stage(np.repeat(probe, hold), None)
        means = _mean_level(wf)[hold - 1 :: hold]
        # least-squares line through (level, mean output): slope = volts per full-scale unit.
        # With five or more levels the two end levels are left out: a minimum pulse width can
        # drop the pulses of the levels next to them. The line through the inner levels is the
        # stage's transfer where a signal spends its time.
        fit = slice(1, -1) if probe.size >= 5 else slice(None)
        slope, offset = np.polyfit(probe[fit], means[fit], 1)
        self.stage_gain = float(slope)
        self.offset = float(offset)
        f = _CAL_FREQ_HZ
        w = 2.0 * np.pi * f / self.modulator_rate_hz
        # the loop's signal transfer (linearized loop), exact for the error-only path
        stf_997 = complex(
            self._loop_space.signal_response(np.array([f / self.modulator_rate_hz]))[0]
        )
        g = self.input_scale * self.stage_gain * abs(stf_997)
        if self.fir is not None:
            fr = self.modulator_rate_hz
            g *= abs(complex(self.fir.response(np.array([f]), frame_rate_hz=fr)[0]))
            self.fir_dc_gain = float(np.sum(self.fir.taps))
        else:
            self.fir_dc_gain = 1.0
        if self.analog_filter is not None:
            h = complex(np.asarray(self.analog_filter.response(np.array([f])))[0])
            g *= abs(h)
            self.analog_dc_gain = float(self.analog_filter.dc_gain)
            analog_delay_s = -np.angle(h) / (2.0 * np.pi * f)
        else:
            self.analog_dc_gain = 1.0
            analog_delay_s = 0.0
        g *= abs(complex(np.asarray(self.upsampler_design.response(np.array([f])))[0]))
        g *= abs(complex(np.asarray(self.downsampler_design.response(np.array([f])))[0]))
        self.gain = float(g)
        self._static_offset = self.offset * self.fir_dc_gain * self.analog_dc_gain
        down_dc = float(np.real(self.downsampler_design.response(np.array([0.0]))[0]))
        self._listening_offset = self._static_offset * down_dc
        # latency: FIR delays + loop phase delay + analog phase delay. The hold of each frame is
        # centred half a frame after its sample, and the frame mean the filter delivers is
        # centred on the same point, so together they add no delay.
        fir_delay = 0.0
        if self.fir is not None:
            hf = complex(self.fir.response(np.array([f]), frame_rate_hz=self.modulator_rate_hz)[0])
            fir_delay = -np.angle(hf) / w
        loop_delay = -np.angle(stf_997) / w
        self.latency_s = float(
            self.upsampler_design.delay_input_samples / self.rate_hz
            + (loop_delay + fir_delay) / self.modulator_rate_hz
            + analog_delay_s
            + self.downsampler_design.delay_seconds
        )

    @functools.cached_property
    def _stf(self):
        """The loop's signal transfer for the error-only path (scipy.signal: made on first use)."""
        return _stf_filter(self._loop_space)

    # -- state ----------------------------------------------------------------------------------

    def initial_state(self, *, skip: int = 0) -> ChainState:
        """The state before the first block (all stages at rest)."""
        c = self.channels
        zeros_i = np.zeros(c, dtype=np.int64)
        stats = ChainStats(
            input_frames=0,
            clipped_samples=zeros_i,
            overload_count=zeros_i,
            state_peak=np.zeros((c, self.ntf.order)),
            dropped_pulses=zeros_i,
            stretched_pulses=zeros_i,
            switching_events=np.zeros(c),
            output_clipped=zeros_i,
            ripple_energy=np.zeros(c),
            ripple_frames=zeros_i,
        )
        per = _ChannelState()
        return ChainState(channels=(per,) * c, stats=stats, to_skip=int(skip))

    # -- one channel ---------------------------------------------------------------------------

    def _reconstruct(self, wf, fir_state, filt_state, ripple=None):
        """Semi-digital FIR (on one-segment waveforms) and the analog filter.

        With a list as ``ripple``, the frames' in-frame ripple energy (volts squared, summed)
        is appended to it.
        """
        from audiodsm.stages.reconstruct import filter_waveform, filter_waveform_power

        if self.fir is not None:
            wf, fir_state = self.fir.process(wf, fir_state)
        if self.analog_filter is None:
            out = _mean_level(wf)
            if ripple is not None:
                squares = (wf.levels * wf.levels * wf.ticks).sum(axis=1) / wf.ticks_per_frame
                ripple.append(float(np.sum(np.maximum(squares - out * out, 0.0))))
        elif ripple is not None:
            out, squares, filt_state = filter_waveform_power(self.analog_filter, wf, filt_state)
            ripple.append(float(np.sum(np.maximum(squares - out * out, 0.0))))
        else:
            out, filt_state = filter_waveform(self.analog_filter, wf, filt_state)
        return out, fir_state, filt_state

    def _channel(self, x, st, keep):
        """One channel's block, run through the stages in cache-sized pieces."""
        step = self.piece_frames
        if x.shape[0] <= step:
            return self._channel_piece(x, st, keep)
        outs = []
        for start in range(0, x.shape[0], step):
            out, st = self._channel_piece(x[start : start + step], st, keep)
            outs.append(out)
        merged = {}
        for name in ("listening", "modulator", "analog", "error", "jitter_error"):
            parts = [o[name] for o in outs]
            merged[name] = None if parts[0] is None else np.concatenate(parts)
        for name in ("dropped", "stretched"):
            merged[name] = sum(o[name] for o in outs)
        merged["ripple"] = tuple(map(sum, zip(*(o["ripple"] for o in outs), strict=True)))
        switches = [o["switches"] for o in outs]
        merged["switches"] = None if switches[0] is None else sum(switches)
        merged["seconds"] = tuple(map(sum, zip(*(o["seconds"] for o in outs), strict=True)))
        return merged, st

    def _channel_piece(self, x, st, keep):
        from audiodsm.stages.output_stage import PulseWaveform

        clock = time.perf_counter
        t0 = clock()
        if self.input_scale != 1.0:
            x = x * self.input_scale  # at the audio rate: the upsampler is linear
        xu, up_s = self._upsampler.process(x, st.upsampler)
        t1 = clock()
        y, mod_s = (self.fixed_loop or self.modulator).run(xu, st.modulator)
        t2 = clock()
        ripple = [] if "analog" in keep else None
        if self._pwm_dead_time is not None:  # output stage and filter in one loop
            analog, squares, (dropped, stretched), out_s = self._pwm_dead_time(y, st.output)
            wf, fir_s, filt_s = None, st.fir, st.analog
            if ripple is not None:
                ripple.append(float(np.sum(np.maximum(squares - analog * analog, 0.0))))
        else:
            wf, (dropped, stretched), out_s = self._waveform(y, st.output)
        prev = st.last_level
        if self.profile.output.kind == "pwm":
            switches = None  # the PWM stage counts its own edges
        elif self.profile.impairments.return_to_zero:  # out of 0 and back in every frame
            switches = 2 * int(np.count_nonzero(y))
        elif y.size:
            first = prev is not None and y[0] != prev
            switches = int(np.count_nonzero(y[1:] != y[:-1])) + int(first)
            prev = float(y[-1])
        else:
            switches = 0
        t3 = clock()
        supply_s = st.supply_frames
        if self._supply_ripple is not None and wf is not None:  # open loop: levels x supply
            from audiodsm.stages.supply import apply_supply_ripple

            wf = apply_supply_ripple(wf, first_frame=supply_s or 0, **self._supply_ripple)
            supply_s = (supply_s or 0) + y.size
        jit_s, steady_s, jitter_part = st.jitter, st.steady_edges, None
        if self._jitter is not None:  # exact frame means of the jittered edges, a frame late
            plain_wf = wf
            wf, jit_s = self._jitter.process_waveform(wf, jit_s)
            if "jitter_error" in keep:  # what the random displacements alone change
                steady, steady_s = self._steady_edges.process_waveform(plain_wf, steady_s)
                jitter_part = PulseWaveform._trusted(
                    wf.levels - steady.levels, wf.ticks, wf.ticks_per_frame, wf.frame_rate_hz
                )
        if wf is not None and self._switched is not None:  # source resistance per segment
            analog, squares, filt_s = self._switched(wf, y, st.analog)
            fir_s = st.fir
            if ripple is not None:
                ripple.append(float(np.sum(np.maximum(squares - analog * analog, 0.0))))
        elif wf is not None:
            analog, fir_s, filt_s = self._reconstruct(wf, st.fir, st.analog, ripple)
        noise_s = st.noise
        if self._noise is not None:  # output-referred: added after the filter
            noise, noise_s = self._noise.process(analog.size, noise_s)
            analog = analog + noise
        t4 = clock()
        # the decimator is linear: calibrate after it, on 1/OSR as many samples
        raw, down_s = self._downsampler.process(analog, st.downsampler, check_finite=False)
        listening = (raw - self._listening_offset) / self.gain
        t5 = clock()
        error = jitter_error = None
        new = _ChannelState(up_s, mod_s, out_s, fir_s, filt_s, down_s, prev)
        new = new._replace(
            jitter=jit_s, noise=noise_s, supply_frames=supply_s, steady_edges=steady_s
        )
        if jitter_part is not None:  # linear stages: the difference through its own copies
            part, jfir_s, jfilt_s = self._reconstruct(jitter_part, st.jitter_fir, st.jitter_analog)
            part_raw, jdown_s = self._downsampler.process(
                part, st.jitter_downsampler, check_finite=False
            )
            jitter_error = part_raw / self.gain  # a difference: no static offset
            new = new._replace(jitter_fir=jfir_s, jitter_analog=jfilt_s, jitter_downsampler=jdown_s)
        if "error" in keep:
            ideal_wf, stf_s = self._ideal_waveform(xu, wf, st.ideal_stf)
            if self._jitter is not None:  # the same one-frame delay as the jittered output
                held = st.ideal_held if st.ideal_held is not None else 0.0
                levels = ideal_wf.levels[:, 0]
                new = new._replace(ideal_held=float(levels[-1]) if levels.size else held)
                delayed = np.concatenate(([held], levels[:-1])).reshape(-1, 1)
                ideal_wf = PulseWaveform._trusted(
                    delayed, ideal_wf.ticks, 1, ideal_wf.frame_rate_hz
                )
            ideal, ifir_s, ifilt_s = self._reconstruct(ideal_wf, st.ideal_fir, st.ideal_analog)
            ideal_raw, idown_s = self._downsampler.process(
                ideal, st.ideal_downsampler, check_finite=False
            )
            error = (raw - ideal_raw) / self.gain  # the static offset cancels
            new = new._replace(
                ideal_stf=stf_s, ideal_fir=ifir_s, ideal_analog=ifilt_s, ideal_downsampler=idown_s
            )
        t6 = clock()
        out = {
            "listening": listening,
            "modulator": y if "modulator" in keep else None,
            "analog": (analog - self._static_offset) / self.gain if "analog" in keep else None,
            "error": error,
            "jitter_error": jitter_error,
            "dropped": dropped,
            "stretched": stretched,
            "switches": switches,
            "ripple": (sum(ripple), y.size) if ripple is not None else (0.0, 0),
            "seconds": (t1 - t0, t2 - t1, t3 - t2, t4 - t3, t5 - t4, t6 - t5),
        }
        return out, new

    def _ideal_waveform(self, xu, wf, stf_state):
        """The ideal modulator output (the input through the loop's STF) as a waveform.

        One segment per frame, through the output stage's static map (gain and offset), on
        the same tick grid as the real waveform.
        """
        from audiodsm.stages.output_stage import _ONE_TICK, PulseWaveform

        if self._stf is None:
            ideal = xu
        else:
            from scipy.signal import lfilter

            num, den = self._stf
            if stf_state is None:
                stf_state = np.zeros(len(den) - 1)
            ideal, stf_state = lfilter(num, den, xu, zi=stf_state)
        levels = (self.offset + self.stage_gain * ideal)[:, None]
        tpf = wf.ticks_per_frame if wf is not None else 1  # one segment a frame either way
        if tpf == 1:
            ticks = _ONE_TICK[: xu.size]
        else:
            ticks = np.full((xu.size, 1), tpf, dtype=np.int64)
        # valid by construction: one segment of the whole frame, finite levels of a finite
        # input through a stable filter
        waveform = PulseWaveform._trusted(levels, ticks, tpf, float(self.modulator_rate_hz))
        return waveform, stf_state

    # -- blocks ---------------------------------------------------------------------------------

    def _check_block(self, x) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        if x.ndim == 1:
            x = x[:, None]
        if x.ndim != 2 or x.shape[1] != self.channels:
            raise ParameterError(
                "x", f"array of shape {x.shape}", f"shape (n, {self.channels}) (or (n,) for mono)"
            )
        if not np.isfinite(x).all():
            raise ParameterError("x", "samples with NaN or Inf", "finite samples")
        return x

    def process(self, x, state=None, *, keep=("listening",)):
        """Run one block of input through the chain (latency included).

        Parameters
        ----------
        x : array_like
            ``(n, channels)`` (or ``(n,)`` for one channel), full scale ±1.0, at ``rate_hz``.
        state : ChainState, optional
            From the previous call; None starts at rest.
        keep : sequence of str, keyword-only
            Outputs to return, from :data:`KEEP_CHOICES`. ``"jitter_error"`` is the part of
            the listening output that the random edge jitter (``impairments.jitter_rms_s``)
            makes: the edge stage's output minus the same stage's output with the random
            displacements taken out (its other edge impairments left in), through the same
            linear stages (semi-digital FIR, analog filter, decimator) and divided by the gain.
            Where the edge error is linear in the displacements (one-segment frames without
            sinusoidal jitter or edge ramps), the output with the random jitter scaled by
            ``k`` is ``listening + (k - 1) * jitter_error`` to rounding.

        Returns
        -------
        block : ChainBlock
        state : ChainState

        Raises
        ------
        ParameterError
            Wrong shape, NaN/Inf, (with ``input.over_full_scale = "refuse"``) a sample
            beyond ±1.0, or ``jitter_error`` asked of a chain without random edge jitter or
            with a filter that follows the switches.
        """
        keep = _check_keep(keep)
        if "jitter_error" in keep and (
            self._steady_edges is None
            or self._switched is not None
            or self._pwm_dead_time is not None
        ):
            raise ParameterError(
                "keep",
                "jitter_error",
                "a chain with random edge jitter and a linear filter (no on-resistance or "
                "dead time)",
            )
        x = self._check_block(x)
        if state is None:
            state = self.initial_state()
        over = np.abs(x) > 1.0
        clipped = over.sum(axis=0)
        if clipped.any():
            if self.profile.input.over_full_scale == "refuse":
                frame = int(np.argwhere(over)[0][0])
                raise ParameterError(
                    "x",
                    f"a sample of {x[over][0]!r} (block frame {frame})",
                    "samples within ±1.0 (the profile sets input.over_full_scale = 'refuse')",
                )
            x = np.clip(x, -1.0, 1.0)
        if self.requantizer is not None and x.shape[0]:
            x, rq_state = self.requantizer.process(x, state.requantizer)
            state = replace(state, requantizer=rq_state)
        if x.shape[0] == 0:  # nothing to do: every requested output is empty
            empty = np.zeros((0, self.channels))
            block = ChainBlock(**{k: (empty if k in keep else None) for k in KEEP_CHOICES})
            return block, state
        parts = []
        step = self.block_frames
        for start in range(0, x.shape[0], step):
            block, state = self._process_piece(x[start : start + step], state, keep)
            parts.append(block)
        stats = state.stats
        stats = replace(
            stats,
            input_frames=stats.input_frames + x.shape[0],
            clipped_samples=stats.clipped_samples + clipped,
        )
        state = replace(state, stats=stats)
        return _concat_blocks(parts, keep, self.channels), state

    def _process_piece(self, x, state, keep):
        cols = [np.ascontiguousarray(x[:, c]) for c in range(self.channels)]
        if self._threads > 1 and self.channels > 1:
            pool = _pool(self._threads)
            futures = [
                pool.submit(self._channel, cols[c], state.channels[c], keep)
                for c in range(self.channels)
            ]
            results = [f.result() for f in futures]
        else:
            results = [
                self._channel(cols[c], state.channels[c], keep) for c in range(self.channels)
            ]
        outs = [r[0] for r in results]
        for o in outs:
            for name, sec in zip(STAGE_NAMES, o["seconds"], strict=True):
                self.stage_seconds[name] += sec
        new_channels = tuple(r[1] for r in results)
        stats = state.stats
        mod_states = [st.modulator for st in new_channels]
        overload = np.array([_scalar(ms.overload_count) for ms in mod_states], dtype=np.int64)
        peaks = np.array([np.asarray(ms.state_peak, dtype=float).reshape(-1) for ms in mod_states])
        switches = np.array(
            [
                o["switches"] if o["switches"] is not None else _pwm_switches(st.output)
                for o, st in zip(outs, new_channels, strict=True)
            ],
            dtype=float,
        )
        if self.profile.output.kind == "pwm":
            switching = switches  # cumulative count held by the PWM stage
        else:
            switching = stats.switching_events + switches
        listening = np.stack([o["listening"] for o in outs], axis=1)
        stats = replace(
            stats,
            overload_count=overload,
            state_peak=peaks,
            dropped_pulses=stats.dropped_pulses + np.array([o["dropped"] for o in outs]),
            stretched_pulses=stats.stretched_pulses + np.array([o["stretched"] for o in outs]),
            switching_events=switching,
            output_clipped=stats.output_clipped + (np.abs(listening) > 1.0).sum(axis=0),
            ripple_energy=stats.ripple_energy + np.array([o["ripple"][0] for o in outs]),
            ripple_frames=stats.ripple_frames + np.array([o["ripple"][1] for o in outs]),
        )
        block = ChainBlock(
            listening=listening,
            modulator=_stack(outs, "modulator"),
            analog=_stack(outs, "analog"),
            error=_stack(outs, "error"),
            jitter_error=_stack(outs, "jitter_error"),
        )
        return block, replace(state, channels=new_channels, stats=stats)

    @property
    def signal_upsampler(self):
        """The upsampler of the signal path (float, or the fixed-point one).

        An ``Upsampler``, or the ``FixedPointUpsampler`` the profile's
        ``fixed_point.interpolator`` asks for.
        """
        return self._upsampler

    # -- aligned streaming ----------------------------------------------------------------------

    @property
    def latency_frames(self) -> int:
        """The latency in whole listening samples (what :meth:`stream` drops at the start)."""
        return int(round(self.latency_s * self.listening_rate_hz))

    def stream(self, blocks: Iterable, *, keep=("listening",), state=None) -> Iterator:
        """Run an iterable of input blocks with the latency removed and the chain flushed.

        Parameters
        ----------
        blocks : iterable of array_like
            Consecutive input blocks, each ``(n, channels)``.
        keep : sequence of str, keyword-only
            Outputs to yield (see :data:`KEEP_CHOICES`). Only the listening-rate outputs
            (``listening``, ``error``, ``jitter_error``) are aligned and flushed;
            ``modulator`` and ``analog`` come raw (latency included) and only for the input
            blocks, not the flush.
        state : ChainState, optional
            A starting state; None starts at rest.

        Yields
        ------
        (ChainBlock, ChainState)
            After each input block, and once more after the flush; the listening outputs
            concatenated hold exactly ``ceil(n_in * listening_rate / rate)`` frames aligned with
            the input. The last state's ``stats`` hold the run's counts.
        """
        keep = _check_keep(keep)
        skip = self.latency_frames
        state = state if state is not None else self.initial_state(skip=skip)
        n_in = 0
        n_out = 0
        for x in blocks:
            x = self._check_block(x)
            n_in += x.shape[0]
            block, state = self.process(x, state, keep=keep)
            block, state = self._trim(block, state)
            n_out += block.listening.shape[0]
            yield block, state
        # flush: enough silence to push the last input sample through the latency
        want = math.ceil(n_in * self.listening_rate_hz / self.rate_hz)
        stats_before = state.stats
        while n_out < want:
            need_out = want - n_out + state.to_skip
            frames = math.ceil(need_out * self.rate_hz / self.listening_rate_hz) + 1
            frames = min(frames, self.block_frames)
            flush_keep = tuple(k for k in keep if k in _LISTENING_RATE) or ("listening",)
            block, state = self.process(np.zeros((frames, self.channels)), state, keep=flush_keep)
            block, state = self._trim(block, state)
            take = min(block.listening.shape[0], want - n_out)
            block = ChainBlock(
                listening=block.listening[:take],
                error=block.error[:take] if block.error is not None else None,
                jitter_error=(
                    block.jitter_error[:take] if block.jitter_error is not None else None
                ),
            )
            n_out += take
            # the flush is not input: keep the input-frame count of the real input
            state = replace(
                state, stats=replace(state.stats, input_frames=stats_before.input_frames)
            )
            yield block, state

    def _trim(self, block, state):
        skip = state.to_skip
        if skip <= 0:
            return block, state
        n = block.listening.shape[0]
        drop = min(skip, n)
        block = replace(
            block,
            listening=block.listening[drop:],
            error=block.error[drop:] if block.error is not None else None,
            jitter_error=block.jitter_error[drop:] if block.jitter_error is not None else None,
        )
        return block, replace(state, to_skip=skip - drop)


# ---------------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------------


class _ChannelState(NamedTuple):
    """One channel's stage states (each a value owned by its stage)."""

    upsampler: object = None
    modulator: object = None
    output: object = None
    fir: object = None
    analog: object = None
    downsampler: object = None
    last_level: float | None = None  # for counting level changes of PDM/NRZ
    ideal_stf: object = None  # the error-only path: STF, FIR, analog filter, downsampler
    ideal_fir: object = None
    ideal_analog: object = None
    ideal_downsampler: object = None
    jitter: object = None  # [impairments]: edge jitter, analog noise, the ideal path's delay
    noise: object = None
    ideal_held: float | None = None
    supply_frames: int | None = None  # frames since the start (the supply ripple's time)
    steady_edges: object = None  # keep="jitter_error": the edge stage without random jitter,
    jitter_fir: object = None  # and the FIR, analog filter and downsampler of the difference
    jitter_analog: object = None
    jitter_downsampler: object = None


_POOLS: dict[tuple[int, int], ThreadPoolExecutor] = {}


def _pool(workers: int) -> ThreadPoolExecutor:
    """A shared worker pool per size and process (threads are reused across blocks and chains).

    Keyed by the process id too: a pool inherited through ``fork`` has no live threads in the
    child, so a forked worker process (e.g. a batch grader) gets its own.
    """
    key = (os.getpid(), workers)
    pool = _POOLS.get(key)
    if pool is None:
        pool = _POOLS[key] = ThreadPoolExecutor(
            max_workers=workers, thread_name_prefix="audiodsm-chain"
        )
    return pool


def release_worker_threads() -> None:
    """Tell every shared worker thread of the chain and the modulator to end; do not wait.

    The shared pools live as long as the process. When Ctrl-C lands while a pool is starting a
    thread, Python's exit can miss that thread and wait for it forever (the thread is started
    before the pool records it). A command ends by calling this: every pool queues its stop
    marker, so each idle thread, recorded or not, ends, and the next use builds new pools.
    """
    from audiodsm.stages import modulator

    for pools in (_POOLS, modulator._POOLS):
        for pool in list(pools.values()):
            pool.shutdown(wait=False, cancel_futures=True)
        pools.clear()


def _check_keep(keep) -> tuple:
    if isinstance(keep, str):
        keep = (keep,)
    keep = tuple(keep)
    for k in keep:
        if k not in KEEP_CHOICES:
            raise ParameterError("keep", k, "one of " + ", ".join(map(repr, KEEP_CHOICES)))
    return keep


def _scalar(v) -> int:
    return int(np.asarray(v).sum())


def _pwm_switches(out_state) -> float:
    """Level changes so far, averaged over the bridge legs (PWM keeps the running totals)."""
    if out_state is None:
        return 0.0
    legs = out_state.totals.transitions
    return float(sum(legs)) / max(1, len(legs))


def _stack(outs, name):
    if outs[0][name] is None:
        return None
    return np.stack([o[name] for o in outs], axis=1)


def _concat_blocks(parts, keep, channels) -> ChainBlock:
    def cat(name):
        arrays = [getattr(p, name) for p in parts if getattr(p, name) is not None]
        if not arrays:
            return None
        return np.concatenate(arrays, axis=0)

    return ChainBlock(
        listening=cat("listening"),
        modulator=cat("modulator"),
        analog=cat("analog"),
        error=cat("error"),
        jitter_error=cat("jitter_error"),
    )


def run_chain(
    profile: ChainProfile,
    x,
    *,
    rate_hz,
    keep=("listening",),
    listening_rate_hz=None,
    align: bool = True,
    threads=None,
) -> ChainResult:
    """Run a whole signal through a profile's chain, in memory.

    Parameters
    ----------
    profile : ChainProfile
    x : array_like
        ``(n,)`` or ``(n, channels)``, full scale ±1.0.
    rate_hz : int, keyword-only
        Input rate, one of :data:`~audiodsm.profile.AUDIO_RATES_HZ`.
    keep : sequence of str, keyword-only
        Outputs to keep, from :data:`KEEP_CHOICES`: ``"listening"`` (calibrated output at the
        listening rate), ``"modulator"`` (the modulator's levels), ``"analog"`` (calibrated
        reconstructed output at the modulator rate, for out-of-band noise), ``"error"``
        (listening output minus the ideal, no gain), ``"jitter_error"`` (the part of the
        listening output the random edge jitter makes, see :meth:`Chain.process`).
    listening_rate_hz : int, optional
        Default: the profile's listening rate (0 there means the input rate).
    align : bool, keyword-only
        Remove the latency from the listening-rate outputs and flush the chain (the default),
        so ``listening`` has ``ceil(n * listening_rate / rate)`` frames aligned with ``x``.
        With False every output is raw (latency included, no flush).
    threads : int, optional
        Worker threads for the channels.

    Returns
    -------
    ChainResult

    Notes
    -----
    The result does not depend on how the chain splits the signal into blocks: every stage's
    streaming output equals its one-shot output bit for bit.

    Levels follow AES17: a sine whose peak reaches full scale (±1.0) is 0 dBFS, and the
    calibration makes a 997 Hz tone come out at the level it went in.

    References
    ----------
    .. [1] AES17-2015, "AES standard method for digital audio engineering - Measurement of
       digital audio equipment", Audio Engineering Society (full-scale level definition and
       the 997 Hz test frequency).
    """
    keep = _check_keep(keep)
    x = np.asarray(x, dtype=np.float64)
    mono = x.ndim == 1
    x2 = x[:, None] if mono else x
    if x2.ndim != 2:
        raise ParameterError("x", f"array of shape {x.shape}", "shape (n,) or (n, channels)")
    chain = Chain.from_profile(
        profile, rate_hz, x2.shape[1], listening_rate_hz=listening_rate_hz, threads=threads
    )
    if align:
        parts = []
        state = None
        for part, part_state in chain.stream([x2], keep=keep):
            parts.append(part)
            state = part_state
        block = _concat_blocks(parts, keep, chain.channels)
    else:
        block, state = chain.process(x2, None, keep=keep)
    stats = state.stats
    modulator, analog, listening, error = (
        block.modulator,
        block.analog,
        block.listening,
        block.error,
    )
    if "listening" not in keep:
        listening = None
    return ChainResult(
        listening=listening,
        modulator=modulator,
        analog=analog,
        error=error,
        rate_hz=float(chain.rate_hz),
        modulator_rate_hz=float(chain.modulator_rate_hz),
        listening_rate_hz=float(chain.listening_rate_hz),
        latency_s=chain.latency_s,
        aligned=bool(align),
        gain=chain.gain,
        stats=stats,
        jitter_error=block.jitter_error,
    )
