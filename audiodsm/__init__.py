"""audiodsm: design, simulate, measure and grade digital delta-sigma noise shapers.

The public names below are loaded on first use, so ``import audiodsm`` stays cheap.
They follow the signal chain:

Noise-transfer design (``audiodsm.design.ntf``)
    NoiseTransfer (NoiseTransfer.designed, NoiseTransfer.from_roots,
    NoiseTransfer.spread_zero_fractions)
Loop realization (``audiodsm.design.realize``)
    LoopRealization (LoopRealization.for_ntf), LinearLoop, STRUCTURES
The quantizer's effective gain (``audiodsm.design.quantizer_gain``)
    QuantizerGain, effective_ntf, single_bit_describing_gain, least_squares_gain
Modulation (``audiodsm.stages.modulator``)
    Modulator (Modulator.probe_stability, Modulator.with_scaled_states,
    Modulator.trace_quantizer_input), ModulatorState,
    StabilityProbe
Rate conversion (``audiodsm.stages.upsample``, ``audiodsm.stages.downsample``)
    design_upsampler, UpsamplerDesign, Upsampler, UpsamplerState,
    design_downsampler, DownsamplerDesign, Downsampler, DownsamplerState
Output stages (``audiodsm.stages.output_stage``)
    PulseWaveform, pdm_waveform, nrz_waveform, pwm_waveform, PwmStats, PwmState,
    level_codes, return_to_zero_waveform
Stream files (``audiodsm.stages.stream_export``)
    PackedBitsWriter, write_packed_bits, read_packed_bits, CodeTextWriter, write_code_text,
    read_code_text
Reconstruction (``audiodsm.stages.filter_design``, ``audiodsm.stages.reconstruct``)
    AnalogFilter, analog_prototype, lc_filter, SemiDigitalFir, semi_digital_fir,
    filter_waveform, filter_waveform_ticks, filter_waveform_power, FilterState,
    filter_pwm_with_dead_time, DeadTimeState, out_of_band_ripple, waveform_ripple,
    RippleReport, filter_report, FilterReport
Chain (``audiodsm.stages.chain``, ``audiodsm.stages.chain_records``)
    Chain, ChainResult, run_chain
Measurement (``audiodsm.measure``)
    a_weighting_db, ccir_weighting_db, weighting_filter, band_limit,
    find_idle_tones
Weightings and band limits (``audiodsm.measure.weighting``, ``audiodsm.measure.bands``)
    a_weighting_db, bs468_weighting_db, ccir_weighting_db, weighting_db, weighting_filter,
    apply_weighting, band_limit_filter, band_limit, band_mask
Test stimuli (``audiodsm.signals``)
    sine, twin_tone_smpte, twin_tone_difference, twin_tone_amplitudes, dc_offset, silence,
    multitone, schroeder_phases, stepped_sine, SteppedSine, tpdf_dither, quantize,
    dbfs_to_amplitude, amplitude_to_dbfs, rms_to_dbfs, dbfs_to_rms
Levels and spectra (``audiodsm.measure.spectrum``)
    level_dbfs, power_to_dbfs, averaged_spectrum, accumulate_spectrum, Spectrum
Sine fits (``audiodsm.measure.sine_fit``)
    fit_sine, SineFit
Residual meter, block by block (``audiodsm.measure.residual``)
    start_residual_meter, update_residual_meter, read_residual_meter
Tone distortion (``audiodsm.measure.tone``)
    thd_plus_noise, thd, sinad_db, enob_bits
Noise (``audiodsm.measure.noise``)
    dynamic_range, idle_channel_noise, out_of_band_power_dbfs, noise_modulation
Level and frequency response (``audiodsm.measure.response``)
    level_linearity, frequency_response, stepped_frequency_response
Intermodulation (``audiodsm.measure.intermod``)
    imd_smpte, imd_difference_frequency
Idle tones and channel content (``audiodsm.measure.idle_tones``, ``audiodsm.measure.classify``,
``audiodsm.measure.channel_analysis``)
    find_idle_tones, IdleToneResult, SpectralLine, line_threshold, welch_degrees_of_freedom,
    line_spectrum, accumulate_line_spectrum, LineSpectrumState, classify_channel,
    ChannelContent, analyze_blocks, ChannelAnalysis
Test battery (``audiodsm.evaluate.battery``)
    run_battery, BatteryPlan, BatteryResult, battery_rate_hz
Design search (``audiodsm.evaluate.search``, ``audiodsm.evaluate.design_job``)
    search_designs, confirm_candidates, predicted_dynamic_range_db, loop_cost, Candidate,
    Confirmation, DesignRequest, DesignOutcome, run_design_job
Audio files (``audiodsm.io``)
    read_audio, read_audio_span, audio_info, AudioInfo, iter_audio_blocks,
    write_audio_atomic, open_audio_writer
Files and profiles
    read_audio, write_audio_atomic, load_profile, load_spec
Chain profiles (``audiodsm.profile``, ``audiodsm.profile_text``)
    ChainProfile, load_profile, parse_profile, profile_to_toml, profile_digest
Spec sheets (``audiodsm.spec``)
    load_spec, parse_spec, spec_digest, SpecSheet, Target, METRIC_CATALOGUE
Grading (``audiodsm.evaluate.grade``)
    grade_batch, grade_metrics, rank_grades, collect_profiles, GradeBatch, ProfileGrade,
    TargetGrade, GradeCache
Reports and plots (``audiodsm.evaluate.report``, ``audiodsm.evaluate.plotting``,
``audiodsm.evaluate.grade_plots``)
    write_report, render_html, batch_to_dict, batch_to_csv, curve_to_csv, write_profile_plots,
    plot_spectrum, plot_noise_density, plot_audio_band_density, plot_thd_n_vs_level,
    plot_thd_n_vs_frequency, plot_idle_tone_map, plot_state_histograms, plot_frequency_response,
    plot_dynamic_range_vs_jitter, plot_overlay, series_style, plot_margins, plot_spectrogram
Audio-file jobs (``audiodsm.evaluate.render``, ``audiodsm.evaluate.analyze``,
``audiodsm.measure.silence``)
    render_file, render_files, output_names, analyze_file, FileAnalysis, SilenceNoiseMeter
Listening by ear (``audiodsm.measure.loudness``, ``audiodsm.measure.alignment``,
``audiodsm.evaluate.listening``, ``audiodsm.evaluate.trial_scores``)
    integrated_loudness_lufs, gain_to_loudness_db, find_delay, DelayEstimate, shift_by_frames,
    make_listening_set, ListeningCandidate, spectrogram_dbfs, score_answers, binomial_tail_p,
    PairScore
Fixed point and the hardware handoff (``audiodsm.design.fixed_point``,
``audiodsm.stages.fixed_loop``, ``audiodsm.hardware.handoff``, ``audiodsm.hardware.rtl``)
    NodeFormat, FixedPointFormat, csd_digits, round_to_csd, quantize_coefficients,
    node_noise_gains, plan_word_lengths, WordLengthPlan, FixedPointModulator, plan_profile,
    check_fixed_point, write_handoff, verilog_text, simulate_words
"""

from __future__ import annotations

import importlib

__version__ = "0.2.0"

# public name -> module that defines it
_PUBLIC = {
    "find_idle_tones": "audiodsm.measure.idle_tones",
    "IdleToneResult": "audiodsm.measure.idle_tones",
    "SpectralLine": "audiodsm.measure.idle_tones",
    "line_threshold": "audiodsm.measure.idle_tones",
    "welch_degrees_of_freedom": "audiodsm.measure.idle_tones",
    "line_spectrum": "audiodsm.measure.idle_tones",
    "accumulate_line_spectrum": "audiodsm.measure.idle_tones",
    "LineSpectrumState": "audiodsm.measure.idle_tones",
    "classify_channel": "audiodsm.measure.classify",
    "ChannelContent": "audiodsm.measure.classify",
    "analyze_blocks": "audiodsm.measure.channel_analysis",
    "ChannelAnalysis": "audiodsm.measure.channel_analysis",
    "read_audio": "audiodsm.io",
    "read_audio_span": "audiodsm.io",
    "audio_info": "audiodsm.io",
    "AudioInfo": "audiodsm.io",
    "iter_audio_blocks": "audiodsm.io",
    "write_audio_atomic": "audiodsm.io",
    "open_audio_writer": "audiodsm.io",
    "NoiseTransfer": "audiodsm.design.ntf",
    "LoopRealization": "audiodsm.design.realize",
    "LinearLoop": "audiodsm.design.realize",
    "STRUCTURES": "audiodsm.design.realize",
    "QuantizerGain": "audiodsm.design.quantizer_gain",
    "effective_ntf": "audiodsm.design.quantizer_gain",
    "single_bit_describing_gain": "audiodsm.design.quantizer_gain",
    "least_squares_gain": "audiodsm.design.quantizer_gain",
    "Modulator": "audiodsm.stages.modulator",
    "ModulatorState": "audiodsm.stages.modulator",
    "StabilityProbe": "audiodsm.stages.modulator",
    "PulseWaveform": "audiodsm.stages.output_stage",
    "pdm_waveform": "audiodsm.stages.output_stage",
    "nrz_waveform": "audiodsm.stages.output_stage",
    "pwm_waveform": "audiodsm.stages.output_stage",
    "PwmStats": "audiodsm.stages.output_stage",
    "PwmState": "audiodsm.stages.output_stage",
    "level_codes": "audiodsm.stages.output_stage",
    "return_to_zero_waveform": "audiodsm.stages.output_stage",
    "PackedBitsWriter": "audiodsm.stages.stream_export",
    "write_packed_bits": "audiodsm.stages.stream_export",
    "read_packed_bits": "audiodsm.stages.stream_export",
    "CodeTextWriter": "audiodsm.stages.stream_export",
    "write_code_text": "audiodsm.stages.stream_export",
    "read_code_text": "audiodsm.stages.stream_export",
    "AnalogFilter": "audiodsm.stages.filter_design",
    "analog_prototype": "audiodsm.stages.filter_design",
    "lc_filter": "audiodsm.stages.filter_design",
    "SemiDigitalFir": "audiodsm.stages.filter_design",
    "semi_digital_fir": "audiodsm.stages.filter_design",
    "filter_waveform": "audiodsm.stages.reconstruct",
    "filter_waveform_ticks": "audiodsm.stages.reconstruct",
    "filter_waveform_power": "audiodsm.stages.reconstruct",
    "filter_pwm_with_dead_time": "audiodsm.stages.reconstruct",
    "DeadTimeState": "audiodsm.stages.reconstruct",
    "FilterState": "audiodsm.stages.reconstruct",
    "out_of_band_ripple": "audiodsm.stages.reconstruct",
    "waveform_ripple": "audiodsm.stages.reconstruct",
    "RippleReport": "audiodsm.stages.reconstruct",
    "filter_report": "audiodsm.stages.reconstruct",
    "FilterReport": "audiodsm.stages.reconstruct",
    "ChainProfile": "audiodsm.profile",
    "Chain": "audiodsm.stages.chain",
    "ChainResult": "audiodsm.stages.chain_records",
    "run_chain": "audiodsm.stages.chain",
    "run_battery": "audiodsm.evaluate.battery",
    "BatteryPlan": "audiodsm.evaluate.battery",
    "BatteryResult": "audiodsm.evaluate.battery",
    "battery_rate_hz": "audiodsm.evaluate.battery",
    "search_designs": "audiodsm.evaluate.search",
    "confirm_candidates": "audiodsm.evaluate.search",
    "predicted_dynamic_range_db": "audiodsm.evaluate.search",
    "loop_cost": "audiodsm.evaluate.search",
    "Candidate": "audiodsm.evaluate.search",
    "Confirmation": "audiodsm.evaluate.search",
    "DesignRequest": "audiodsm.evaluate.design_job",
    "DesignOutcome": "audiodsm.evaluate.design_job",
    "run_design_job": "audiodsm.evaluate.design_job",
    "load_profile": "audiodsm.profile",
    "parse_profile": "audiodsm.profile",
    "profile_to_toml": "audiodsm.profile_text",
    "profile_digest": "audiodsm.profile_text",
    "a_weighting_db": "audiodsm.measure.weighting",
    "bs468_weighting_db": "audiodsm.measure.weighting",
    "ccir_weighting_db": "audiodsm.measure.weighting",
    "weighting_db": "audiodsm.measure.weighting",
    "weighting_filter": "audiodsm.measure.weighting",
    "apply_weighting": "audiodsm.measure.weighting",
    "band_limit_filter": "audiodsm.measure.bands",
    "band_limit": "audiodsm.measure.bands",
    "band_mask": "audiodsm.measure.bands",
    "sine": "audiodsm.signals",
    "twin_tone_smpte": "audiodsm.signals",
    "twin_tone_difference": "audiodsm.signals",
    "twin_tone_amplitudes": "audiodsm.signals",
    "dc_offset": "audiodsm.signals",
    "silence": "audiodsm.signals",
    "multitone": "audiodsm.signals",
    "schroeder_phases": "audiodsm.signals",
    "stepped_sine": "audiodsm.signals",
    "SteppedSine": "audiodsm.signals",
    "tpdf_dither": "audiodsm.signals",
    "quantize": "audiodsm.signals",
    "dbfs_to_amplitude": "audiodsm.signals",
    "amplitude_to_dbfs": "audiodsm.signals",
    "rms_to_dbfs": "audiodsm.signals",
    "dbfs_to_rms": "audiodsm.signals",
    "design_upsampler": "audiodsm.stages.upsample",
    "UpsamplerDesign": "audiodsm.stages.upsample",
    "Upsampler": "audiodsm.stages.upsample",
    "UpsamplerState": "audiodsm.stages.upsample",
    "design_downsampler": "audiodsm.stages.downsample",
    "DownsamplerDesign": "audiodsm.stages.downsample",
    "Downsampler": "audiodsm.stages.downsample",
    "DownsamplerState": "audiodsm.stages.downsample",
    "level_dbfs": "audiodsm.measure.spectrum",
    "power_to_dbfs": "audiodsm.measure.spectrum",
    "averaged_spectrum": "audiodsm.measure.spectrum",
    "accumulate_spectrum": "audiodsm.measure.spectrum",
    "Spectrum": "audiodsm.measure.spectrum",
    "fit_sine": "audiodsm.measure.sine_fit",
    "SineFit": "audiodsm.measure.sine_fit",
    "thd_plus_noise": "audiodsm.measure.tone",
    "thd": "audiodsm.measure.tone",
    "sinad_db": "audiodsm.measure.tone",
    "enob_bits": "audiodsm.measure.tone",
    "dynamic_range": "audiodsm.measure.noise",
    "idle_channel_noise": "audiodsm.measure.noise",
    "start_residual_meter": "audiodsm.measure.residual",
    "update_residual_meter": "audiodsm.measure.residual",
    "read_residual_meter": "audiodsm.measure.residual",
    "level_linearity": "audiodsm.measure.response",
    "frequency_response": "audiodsm.measure.response",
    "stepped_frequency_response": "audiodsm.measure.response",
    "imd_smpte": "audiodsm.measure.intermod",
    "imd_difference_frequency": "audiodsm.measure.intermod",
    "out_of_band_power_dbfs": "audiodsm.measure.noise",
    "noise_modulation": "audiodsm.measure.noise",
    "load_spec": "audiodsm.spec",
    "parse_spec": "audiodsm.spec",
    "spec_digest": "audiodsm.spec",
    "SpecSheet": "audiodsm.spec",
    "Target": "audiodsm.spec",
    "METRIC_CATALOGUE": "audiodsm.spec",
    "grade_batch": "audiodsm.evaluate.grade",
    "grade_metrics": "audiodsm.evaluate.grade",
    "rank_grades": "audiodsm.evaluate.grade",
    "collect_profiles": "audiodsm.evaluate.grade",
    "GradeBatch": "audiodsm.evaluate.grade",
    "ProfileGrade": "audiodsm.evaluate.grade",
    "TargetGrade": "audiodsm.evaluate.grade",
    "GradeCache": "audiodsm.evaluate.grade",
    "write_report": "audiodsm.evaluate.report",
    "render_html": "audiodsm.evaluate.report",
    "batch_to_dict": "audiodsm.evaluate.report",
    "batch_to_csv": "audiodsm.evaluate.report",
    "curve_to_csv": "audiodsm.evaluate.report",
    "write_profile_plots": "audiodsm.evaluate.report",
    "plot_spectrum": "audiodsm.evaluate.plotting",
    "plot_noise_density": "audiodsm.evaluate.plotting",
    "plot_audio_band_density": "audiodsm.evaluate.plotting",
    "plot_thd_n_vs_frequency": "audiodsm.evaluate.plotting",
    "plot_overlay": "audiodsm.evaluate.plotting",
    "series_style": "audiodsm.evaluate.plotting",
    "plot_thd_n_vs_level": "audiodsm.evaluate.plotting",
    "plot_idle_tone_map": "audiodsm.evaluate.plotting",
    "plot_state_histograms": "audiodsm.evaluate.plotting",
    "plot_frequency_response": "audiodsm.evaluate.plotting",
    "plot_dynamic_range_vs_jitter": "audiodsm.evaluate.plotting",
    "plot_margins": "audiodsm.evaluate.grade_plots",
    "plot_spectrogram": "audiodsm.evaluate.plotting",
    "integrated_loudness_lufs": "audiodsm.measure.loudness",
    "gain_to_loudness_db": "audiodsm.measure.loudness",
    "find_delay": "audiodsm.measure.alignment",
    "DelayEstimate": "audiodsm.measure.alignment",
    "shift_by_frames": "audiodsm.measure.alignment",
    "make_listening_set": "audiodsm.evaluate.listening",
    "ListeningCandidate": "audiodsm.evaluate.listening",
    "spectrogram_dbfs": "audiodsm.evaluate.listening",
    "score_answers": "audiodsm.evaluate.trial_scores",
    "binomial_tail_p": "audiodsm.evaluate.trial_scores",
    "PairScore": "audiodsm.evaluate.trial_scores",
    "render_file": "audiodsm.evaluate.render",
    "render_files": "audiodsm.evaluate.render",
    "output_names": "audiodsm.evaluate.render",
    "analyze_file": "audiodsm.evaluate.analyze",
    "FileAnalysis": "audiodsm.evaluate.analyze",
    "SilenceNoiseMeter": "audiodsm.measure.silence",
    "NodeFormat": "audiodsm.design.fixed_point",
    "FixedPointFormat": "audiodsm.design.fixed_point",
    "csd_digits": "audiodsm.design.fixed_point",
    "round_to_csd": "audiodsm.design.fixed_point",
    "quantize_coefficients": "audiodsm.design.fixed_point",
    "node_noise_gains": "audiodsm.design.fixed_point",
    "plan_word_lengths": "audiodsm.design.fixed_point",
    "WordLengthPlan": "audiodsm.design.fixed_point",
    "FixedPointModulator": "audiodsm.stages.fixed_loop",
    "plan_profile": "audiodsm.hardware.handoff",
    "check_fixed_point": "audiodsm.hardware.handoff",
    "write_handoff": "audiodsm.hardware.handoff",
    "verilog_text": "audiodsm.hardware.rtl",
    "simulate_words": "audiodsm.hardware.rtl",
}

__all__ = ["__version__", *sorted(_PUBLIC)]


def __getattr__(name: str):
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'audiodsm' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__():
    return __all__
