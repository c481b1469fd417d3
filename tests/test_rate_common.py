"""Tests of the half-band design the rate converters share (audiodsm.stages.rate_common)."""

import numpy as np
import pytest
from scipy import signal

from audiodsm.stages.rate_common import (
    _halfband,
    _halfband_error,
    _halfband_full,
    _halfband_minimax,
)

# Common-practice interpolation spec of audio DAC datasheets (the shared REFERENCES.md,
# "Interpolation filters"): passband to 0.4535 fs, stopband from 0.5465 fs.
PASS_EDGE = 0.4535
STOP_EDGE = 0.5465


@pytest.mark.parametrize("pass_frac", [PASS_EDGE / 2, STOP_EDGE / 16])
def test_halfband_designs_are_true_halfbands(pass_frac):
    # Half-band identities (Vaidyanathan & Nguyen, IEEE Trans. CAS 34(3), 1987): every other
    # tap is zero except the centre tap 1/2, so H(f) + H(1/2 - f) = 1 for the zero-phase
    # amplitude; pass and stop errors are equal. Stage 1 (Remez path) and a late stage
    # (linear-programme path) both.
    max_error = 10 ** (-103 / 20)
    h = _halfband_full(_halfband(pass_frac, max_error))
    centre = h.size // 2
    offsets = np.arange(h.size) - centre
    assert h[centre] == 0.5
    assert np.all(h[(offsets % 2 == 0) & (offsets != 0)] == 0.0)
    f = np.linspace(0, 0.5, 2001)
    amp = np.real(signal.freqz(h, worN=f, fs=1.0)[1] * np.exp(2j * np.pi * f * centre))
    assert np.allclose(amp + amp[::-1], 1.0, atol=1e-12)
    assert np.max(np.abs(amp[f <= pass_frac] - 1)) <= max_error
    assert np.max(np.abs(amp[f >= 0.5 - pass_frac])) <= max_error


def test_linear_programme_reaches_the_parks_mcclellan_optimum():
    # The Parks-McClellan optimum of a length (scipy.signal.remez) is the smallest error any
    # design of that length reaches. The linear programme used for narrow bands, run on a
    # band where Remez also works, must reach the same error: within 3 %, the size of the
    # differences both methods' finite frequency grids make.
    pass_frac = STOP_EDGE / 4  # stage 2: dense-phase band 0.273 cycles/sample
    for two_k in (8, 14, 20):
        ours = _halfband_error(_halfband_minimax(two_k, pass_frac), pass_frac)
        ref = signal.remez(two_k, [0, 2 * pass_frac], [1.0], fs=1.0)
        best = _halfband_error(ref, pass_frac)
        assert ours == pytest.approx(best, rel=0.03), two_k


def test_fir_response_gives_scipy_freqz_bit_for_bit(rng):
    # the reference is scipy.signal.freqz with an array of frequencies: fir_response evaluates
    # the same polynomial the same way with numpy alone (the chain's calibration uses it)
    from audiodsm.stages.rate_common import fir_response

    for taps in (_halfband_full(_halfband(PASS_EDGE / 2, 1e-5)), rng.standard_normal(37), [1.0]):
        for rate in (48000.0, 3072000.0):
            freq = np.concatenate([[0.0, 997.0, 20000.0], rng.uniform(0.0, rate / 2, 50)])
            want = signal.freqz(taps, worN=freq, fs=rate)[1]
            np.testing.assert_array_equal(fir_response(taps, freq, rate), want)
