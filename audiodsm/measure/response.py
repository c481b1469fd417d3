"""Gain against level and against frequency: level linearity and frequency response (AES17).

Every function takes captures as float arrays (full scale ±1.0) with the sample rate passed
as ``rate_hz=``, and returns a small frozen result.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import signal as _sig

from audiodsm.errors import ParameterError
from audiodsm.measure.sine_fit import (
    _check_frequency,
    _fit_lines,
    _settle_frames,
    fit_sine,
)
from audiodsm.measure.spectrum import _as_signal, _check_rate, power_to_dbfs

__all__ = [
    "AES17_TEST_HZ",
    "LevelLinearity",
    "level_linearity",
    "FrequencyResponse",
    "frequency_response",
    "stepped_frequency_response",
]

AES17_TEST_HZ = 997.0


# ---------------------------------------------------------------------------------------------
# Level linearity, frequency response
# ---------------------------------------------------------------------------------------------


#: Octave frequency ratio of IEC 61260-1:2014 (base-10 system): G = 10**(3/10).
_OCTAVE_RATIO_BASE10 = 10.0**0.3


def _third_octave_sos(centre_hz, rate):
    """Design the 1/3-octave band-pass around ``centre_hz``.

    Sixth-order Butterworth (3rd-order prototype) with base-10 band edges
    ``f * G**(±1/6)``, ``G = 10**(3/10)`` (IEC 61260-1:2014, which prefers the base-10
    system); the order is common practice. It meets the standard's class-1 limits on relative
    attenuation (checked in tests/test_response.py).

    References
    ----------
    .. [1] IEC 61260-1:2014, Electroacoustics - Octave-band and fractional-octave-band
       filters - Part 1: Specifications, octave ratio and band edges (from memory).
    """
    edge = _OCTAVE_RATIO_BASE10 ** (1.0 / 6.0)
    lo, hi = centre_hz / edge, centre_hz * edge
    if hi >= rate / 2:
        raise ParameterError("frequency_hz", centre_hz, f"a 1/3-octave band below {rate / 2:g} Hz")
    return _sig.butter(3, [lo, hi], btype="bandpass", output="sos", fs=rate)


@dataclass(frozen=True)
class LevelLinearity:
    """Gain deviation against level.

    Attributes
    ----------
    levels_dbfs : tuple of float
        Stimulus levels as given.
    measured_dbfs : tuple of float
        Level of each capture in the 1/3-octave band at the test frequency.
    deviation_db : tuple of float
        ``(measured - level) - (measured_ref - level_ref)``: the change of gain relative to
        the gain at the reference level.
    reference_dbfs : float
    frequency_hz : float
    max_deviation_db : float
        Largest absolute deviation.
    """

    levels_dbfs: tuple
    measured_dbfs: tuple
    deviation_db: tuple
    reference_dbfs: float
    frequency_hz: float
    max_deviation_db: float


def level_linearity(
    captures,
    *,
    rate_hz,
    levels_dbfs,
    frequency_hz=AES17_TEST_HZ,
    reference_dbfs=None,
    settle_s=0.1,
):
    """Gain deviation against level, read in a 1/3-octave band at the test frequency.

    Parameters
    ----------
    captures : sequence of array_like
        One capture per stimulus level, each a tone at ``frequency_hz``.
    rate_hz : float
    levels_dbfs : sequence of float
        The stimulus level of each capture (e.g. 0 to -120 dBFS).
    frequency_hz : float
        Test frequency, the centre of the 1/3-octave band.
    reference_dbfs : float, optional
        The level whose gain is the reference (must be one of ``levels_dbfs``); the highest
        level by default.
    settle_s : float
        Seconds excluded at the start of each capture while the band-pass settles.

    Returns
    -------
    LevelLinearity

    References
    ----------
    .. [1] AES17-2015, level-dependent gain (gain linearity) measured through a 1/3-octave
       band-pass at the test frequency (from memory).
    .. [2] IEC 61260-1:2014, fractional-octave band edges ``f * G**(±1/6)`` with the base-10
       octave ratio ``G = 10**(3/10)``.
    """
    rate = _check_rate(rate_hz)
    freq = _check_frequency(frequency_hz, rate)
    levels = [float(v) for v in levels_dbfs]
    caps = list(captures)
    if len(caps) != len(levels) or not caps:
        raise ParameterError(
            "captures", f"{len(caps)} captures for {len(levels)} levels", "one capture per level"
        )
    ref = max(levels) if reference_dbfs is None else float(reference_dbfs)
    if ref not in levels:
        raise ParameterError("reference_dbfs", reference_dbfs, "one of levels_dbfs")
    sos = _third_octave_sos(freq, rate)
    skip = _settle_frames(settle_s, rate)
    measured = []
    for i, cap in enumerate(caps):
        arr = _as_signal(cap, f"captures[{i}]")
        if len(arr) <= skip:
            raise ParameterError(
                f"captures[{i}]", f"{len(arr)} frames", f"more than {skip} frames (settling)"
            )
        y = _sig.sosfilt(sos, arr)[skip:]
        measured.append(power_to_dbfs(float(np.mean(y * y))))
    gain_ref = measured[levels.index(ref)] - ref
    dev = tuple(m - lv - gain_ref for m, lv in zip(measured, levels, strict=True))
    return LevelLinearity(
        levels_dbfs=tuple(levels),
        measured_dbfs=tuple(measured),
        deviation_db=dev,
        reference_dbfs=ref,
        frequency_hz=freq,
        max_deviation_db=max(abs(d) for d in dev),
    )


@dataclass(frozen=True)
class FrequencyResponse:
    """Gain against frequency relative to the gain at the reference frequency.

    Attributes
    ----------
    frequency_hz : tuple of float
    gain_db : tuple of float
        Response at each frequency relative to the response at ``reference_hz``.
    reference_hz : float
    ripple_db : float
        Peak-to-peak spread of ``gain_db`` over the frequencies within
        ``[lower_hz, upper_hz]``.
    lower_hz, upper_hz : float
    """

    frequency_hz: tuple
    gain_db: tuple
    reference_hz: float
    ripple_db: float
    lower_hz: float
    upper_hz: float


def _response_result(freqs, amps_out, amps_in, reference_hz, lower_hz, upper_hz):
    freqs = [float(f) for f in freqs]
    if reference_hz not in freqs:
        raise ParameterError("reference_hz", reference_hz, "one of frequencies_hz")
    gains = [20.0 * math.log10(o / i) for o, i in zip(amps_out, amps_in, strict=True)]
    g_ref = gains[freqs.index(reference_hz)]
    rel = tuple(g - g_ref for g in gains)
    inband = [g for f, g in zip(freqs, rel, strict=True) if lower_hz <= f <= upper_hz]
    ripple = (max(inband) - min(inband)) if inband else 0.0
    return FrequencyResponse(tuple(freqs), rel, float(reference_hz), ripple, lower_hz, upper_hz)


def _check_amplitudes(input_amplitudes, count):
    if input_amplitudes is None:
        return [1.0] * count
    amps = [float(a) for a in np.atleast_1d(input_amplitudes)]
    if len(amps) == 1:
        amps = amps * count
    if len(amps) != count or not all(a > 0 for a in amps):
        raise ParameterError(
            "input_amplitudes", input_amplitudes, f"one positive amplitude or {count} of them"
        )
    return amps


def frequency_response(
    x,
    *,
    rate_hz,
    frequencies_hz,
    input_amplitudes=None,
    reference_hz=AES17_TEST_HZ,
    lower_hz=20.0,
    upper_hz=20000.0,
    settle_s=0.1,
):
    """Frequency response from a multitone capture, relative to the reference frequency.

    All tone amplitudes are fitted jointly by least squares at their exact frequencies (with
    DC), after ``settle_s`` seconds; dividing by the stimulus amplitudes gives each tone's
    gain, reported relative to the gain at ``reference_hz``.

    Parameters
    ----------
    x : array_like
        One channel holding the response to a multitone.
    rate_hz : float
    frequencies_hz : sequence of float
        The tone frequencies (``reference_hz`` among them), all distinct.
    input_amplitudes : float or sequence of float, optional
        Stimulus amplitude of each tone (all equal by default).
    reference_hz : float
        The reference frequency (AES17: 997 Hz).
    lower_hz, upper_hz : float
        The band over which the ripple is read.
    settle_s : float
        Seconds skipped at the start.

    Returns
    -------
    FrequencyResponse

    References
    ----------
    .. [1] AES17-2015, frequency response relative to the 997 Hz response (from memory).
    """
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    freqs = [_check_frequency(float(f), rate, "frequencies_hz") for f in frequencies_hz]
    if len(set(freqs)) != len(freqs) or not freqs:
        raise ParameterError("frequencies_hz", frequencies_hz, "distinct tone frequencies")
    amps_in = _check_amplitudes(input_amplitudes, len(freqs))
    skip = _settle_frames(settle_s, rate)
    if len(arr) - skip < 4 * len(freqs) + 16:
        raise ParameterError("x", f"{len(arr)} frames", "a longer capture for this many tones")
    amps, _ = _fit_lines(arr[skip:], freqs, rate)
    return _response_result(freqs, np.abs(amps), amps_in, float(reference_hz), lower_hz, upper_hz)


def stepped_frequency_response(
    captures,
    *,
    rate_hz,
    frequencies_hz,
    input_amplitudes=None,
    reference_hz=AES17_TEST_HZ,
    lower_hz=20.0,
    upper_hz=20000.0,
    settle_s=0.1,
):
    """Frequency response from one capture per frequency (a stepped sine).

    Each capture's amplitude is a 3-parameter sine fit at its stated frequency after
    ``settle_s`` seconds. Parameters and result as :func:`frequency_response`, with
    ``captures[i]`` the response to a sine at ``frequencies_hz[i]``.

    References
    ----------
    .. [1] AES17-2015, frequency response relative to the 997 Hz response (from memory).
    """
    rate = _check_rate(rate_hz)
    freqs = [_check_frequency(float(f), rate, "frequencies_hz") for f in frequencies_hz]
    caps = list(captures)
    if len(caps) != len(freqs) or not caps:
        raise ParameterError(
            "captures", f"{len(caps)} captures for {len(freqs)} frequencies", "one per frequency"
        )
    amps_in = _check_amplitudes(input_amplitudes, len(freqs))
    skip = _settle_frames(settle_s, rate)
    amps = []
    for i, (cap, f) in enumerate(zip(caps, freqs, strict=True)):
        arr = _as_signal(cap, f"captures[{i}]")
        if len(arr) - skip < 16:
            raise ParameterError(f"captures[{i}]", f"{len(arr)} frames", f"more than {skip + 16}")
        fit = fit_sine(arr[skip:], rate_hz=rate, frequency_hz=f, four_parameter=False)
        amps.append(fit.amplitude)
    return _response_result(freqs, amps, amps_in, float(reference_hz), lower_hz, upper_hz)
