"""Closed-form results of delta-sigma theory checked on the simulated loops.

Each check names its source beside it; expected values are computed here from the formula.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import windows

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.stages.modulator import Modulator

N_SAMPLES = 1 << 20


def _line_amplitude(y: np.ndarray, freq: float) -> float:
    """Peak amplitude of the spectral line at ``freq`` (cycles per sample).

    A flat-top window (scipy.signal.windows.flattop) reads a line's amplitude to about 0.01 dB
    wherever it falls between bins, so no coherent frequency is needed.
    """
    win = windows.flattop(len(y), sym=False)
    spec = np.abs(np.fft.rfft(y * win)) / (win.sum() / 2)
    k = int(round(freq * len(y)))
    return float(spec[k - 3 : k + 4].max())


@pytest.mark.parametrize("dc", [0.0123456, -0.0037, 0.0291, 0.003141])
def test_first_order_idle_tone_levels_for_dc_inputs(dc):
    # First-order single-bit loop, NTF = 1 - z^-1, constant input x (R. M. Gray, "Spectral
    # analysis of quantization noise in a single-loop sigma-delta modulator with dc input",
    # IEEE Trans. Commun. 37(6), 1989; J. C. Candy & O. J. Benjamin, IEEE Trans. Commun.
    # 29(9), 1981): the +-1 output is v[n] = 2 (floor((n+1) b + c) - floor(n b + c)) - 1 with
    # b = (1 + x) / 2. The Fourier series of the fractional part, {t} - 1/2 =
    # -sum_k sin(2 pi k t) / (pi k), differenced once, puts a line at k b (mod 1) of peak
    # amplitude 4 |sin(pi k b)| / (pi k) for every k. The in-band idle tone is k = 2: at
    # frequency |x| (cycles per sample) with amplitude (2 / pi) sin(pi |x|); k = 4 is its
    # second harmonic. Both are checked in level (0.1 dB: the flat-top window's accuracy plus
    # margin) and, through where they are read, in frequency.
    ntf = NoiseTransfer(zeros=np.array([1.0 + 0j]), poles=np.array([0j]))
    y, state = Modulator(ntf, levels=2).run(np.full(N_SAMPLES, dc))
    assert state.overload_count == 0
    b = (1.0 + dc) / 2.0
    for k in (2, 4):
        freq = (k * b) % 1.0
        freq = min(freq, 1.0 - freq)
        expected = 4.0 * abs(np.sin(np.pi * k * b)) / (np.pi * k)
        got = _line_amplitude(y, freq)
        assert 20 * np.log10(got / expected) == pytest.approx(0.0, abs=0.1)
    # the k = 2 line sits at |x| and reads 20 log10((2/pi) sin(pi |x|)) dBFS
    level_dbfs = 20 * np.log10(_line_amplitude(y, abs(dc)))
    assert level_dbfs == pytest.approx(20 * np.log10(2 / np.pi * np.sin(np.pi * abs(dc))), abs=0.1)
