"""Loop realization: NTF computed back from the coefficients, signal transfer, scaling."""

import numpy as np
import pytest
from scipy import signal

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.design.realize import STRUCTURES, LoopRealization
from audiodsm.errors import ParameterError

# Log-spaced grid from deep in the band to Nyquist. Relative error near an NTF zero grows like
# (zero position error) / (distance to the zero); 1e-9 holds on this grid for every design.
GRID = np.geomspace(1e-5, 0.5, 600)


@pytest.mark.parametrize("order", range(1, 9))
@pytest.mark.parametrize("zero_layout", ["dc", "spread"])
@pytest.mark.parametrize("structure", STRUCTURES)
def test_realized_ntf_equals_design(order, zero_layout, structure):
    ntf = NoiseTransfer.designed(order, osr=64, out_of_band_gain=1.5, zero_layout=zero_layout)
    loop = LoopRealization.for_ntf(ntf, structure=structure)
    back = loop.realized_ntf()
    rel = np.abs(back.response(GRID) / ntf.response(GRID) - 1)
    assert rel.max() < 1e-9


@pytest.mark.filterwarnings("ignore::scipy.signal.BadCoefficients")
@pytest.mark.parametrize("order", [1, 3, 5])
@pytest.mark.parametrize("structure", STRUCTURES)
def test_state_space_matches_scipy_dlti(order, structure):
    # Outside check: scipy.signal.dlti evaluates the closed-loop state space on its own. It
    # converts to polynomial (transfer-function) form first, which loses digits as the order
    # grows, so the check is kept to orders up to 5 and out of band (f >= 0.05), where both
    # agree to 1e-9 relative.
    ntf = NoiseTransfer.designed(order, osr=64, out_of_band_gain=1.5)
    ss = LoopRealization.for_ntf(ntf, structure=structure).linearized()
    acl = ss.closed_transition()
    f = np.linspace(0.05, 0.5, 40)
    sys_noise = signal.dlti(
        acl, ss.feedback_entry[:, None], ss.quantizer_tap[None, :], [[1.0]], dt=1
    )
    _, h = sys_noise.freqresp(2 * np.pi * f)
    np.testing.assert_allclose(h, ntf.response(f), rtol=1e-9)
    b_sig = (ss.input_entry + ss.feedback_entry * ss.input_direct)[:, None]
    sys_sig = signal.dlti(acl, b_sig, ss.quantizer_tap[None, :], [[ss.input_direct]], dt=1)
    _, h0 = sys_sig.freqresp(np.array([0.0]))
    assert abs(h0[0] - 1) < 1e-9  # unity signal transfer at DC, all structures


def test_error_feedback_signal_transfer_is_one_everywhere():
    loop = LoopRealization.for_ntf(NoiseTransfer.designed(5, osr=32), structure="error-feedback")
    stf = loop.linearized().signal_response(np.linspace(0, 0.5, 50))
    np.testing.assert_allclose(stf, 1.0, atol=1e-12)


def test_second_order_textbook_coefficients():
    # Schreier & Temes 2005, ch. 3 (chapter from memory): the second-order loop with NTF
    # (1 - z^-1)^2 built from two delaying integrators with distributed feedback has feedback
    # gains 1 and 2 (and input gain 1 into the first integrator); the first-order loop
    # (1 - z^-1) has feedback gain 1. By hand: 1 - L(z) = ((z-1)^2 + a2 (z-1) + a1) / (z-1)^2
    # must equal z^2 / (z-1)^2, so a2 = 2 and a1 = 1.
    loop2 = LoopRealization.for_ntf(
        NoiseTransfer.from_roots(zeros=[1, 1], poles=[0, 0]), structure="feedback"
    )
    np.testing.assert_allclose(loop2.feedback, [1.0, 2.0], atol=1e-12)
    np.testing.assert_allclose(loop2.input_gain, [1.0, 0.0], atol=1e-12)
    loop1 = LoopRealization.for_ntf(
        NoiseTransfer.from_roots(zeros=[1], poles=[0]), structure="feedback"
    )
    np.testing.assert_allclose(loop1.feedback, [1.0], atol=1e-12)


def test_resonator_coefficient_places_the_zero():
    # A lossless discrete integrator pair z^2 - (2 - g) z + 1 has its zeros at exp(+-j theta)
    # with g = 2 (1 - cos theta) (first principles); the realization must put them there.
    ntf = NoiseTransfer.designed(4, osr=64, zero_layout="spread")
    loop = LoopRealization.for_ntf(ntf, structure="feedback")
    pairs = [i for i in range(loop.order - 1) if loop.resonator[i] != 0]
    thetas = sorted(abs(np.angle(z)) for z in ntf.zeros if z.imag > 0)
    for i, theta in zip(pairs, thetas, strict=True):
        assert loop.resonator[i] == pytest.approx(2 * (1 - np.cos(theta)), rel=1e-9)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_scaling_is_a_similarity_transform(structure, rng):
    ntf = NoiseTransfer.designed(6, osr=64, out_of_band_gain=1.5)
    loop = LoopRealization.for_ntf(ntf, structure=structure)
    peaks = rng.uniform(0.1, 10, 6)
    scaled = loop.rescaled(peaks, peak_target=0.5)
    s = peaks / 0.5
    if structure != "feedforward":
        s[-1] = 1.0
    a0, a1 = loop.linearized(), scaled.linearized()
    # x_s = S^-1 x with S = diag(s): A_s = S^-1 A S, B_s = S^-1 B, C_s = C S (linear algebra)
    np.testing.assert_allclose(
        a1.transition, (a0.transition * s[None, :]) / s[:, None], rtol=1e-12, atol=1e-15
    )
    np.testing.assert_allclose(a1.feedback_entry, a0.feedback_entry / s, rtol=1e-12)
    np.testing.assert_allclose(a1.input_entry, a0.input_entry / s, rtol=1e-12)
    np.testing.assert_allclose(a1.quantizer_tap, a0.quantizer_tap * s, rtol=1e-12)
    rel = np.abs(scaled.realized_ntf().response(GRID) / ntf.response(GRID) - 1)
    assert rel.max() < 1e-9
    np.testing.assert_allclose(scaled.state_scale, s)


@pytest.mark.parametrize(
    ("order", "osr", "out_of_band_gain"), [(3, 8, 3.0), (6, 16, 2.0), (8, 256, 1.5)]
)
def test_other_designs_are_realized(order, osr, out_of_band_gain):
    ntf = NoiseTransfer.designed(order, osr=osr, out_of_band_gain=out_of_band_gain)
    for structure in STRUCTURES:
        back = LoopRealization.for_ntf(ntf, structure=structure).realized_ntf()
        rel = np.abs(back.response(GRID) / ntf.response(GRID) - 1)
        assert rel.max() < 1e-9


def test_leaky_zeros_are_realized():
    # zeros inside the unit circle (a leaky integrator and a damped resonator pair)
    ntf = NoiseTransfer.from_roots(
        zeros=[0.98, 0.97 * np.exp(0.1j), 0.97 * np.exp(-0.1j)], poles=[0.5, 0.4, 0.3]
    )
    for structure in STRUCTURES:
        back = LoopRealization.for_ntf(ntf, structure=structure).realized_ntf()
        rel = np.abs(back.response(GRID) / ntf.response(GRID) - 1)
        assert rel.max() < 1e-9


def test_bad_input():
    ntf = NoiseTransfer.designed(3, osr=64)
    with pytest.raises(ParameterError, match="structure"):
        LoopRealization.for_ntf(ntf, structure="sideways")
    with pytest.raises(ParameterError, match="ntf"):
        LoopRealization.for_ntf("not an ntf", structure="feedback")
    loop = LoopRealization.for_ntf(ntf, structure="feedback")
    with pytest.raises(ParameterError, match="state_peaks"):
        loop.rescaled([1.0, 0.0, 1.0])
    with pytest.raises(ParameterError, match="state_peaks"):
        loop.rescaled([1.0, 1.0])
    with pytest.raises(ParameterError, match="peak_target"):
        loop.rescaled([1.0, 1.0, 1.0], peak_target=-1)


# --------------------------------------------------------------------------------------------
# feedforward loop with the input fed straight to the quantizer


@pytest.mark.filterwarnings("ignore::scipy.signal.BadCoefficients")
@pytest.mark.parametrize("order", [2, 3, 5])
def test_feed_in_signal_transfer_is_one_and_ntf_unchanged(order):
    ntf = NoiseTransfer.designed(order, osr=64, out_of_band_gain=1.5)
    loop = LoopRealization.for_ntf(ntf, structure="feedforward", input_feed_in=True)
    assert loop.input_feed_in and loop.direct_input == 1.0
    ss = loop.linearized()
    f = np.linspace(0.0, 0.5, 60)
    # Outside check: scipy.signal.dlti on the closed-loop state space gives STF = 1 at every
    # frequency (input into the first integrator cancels the fed-back signal part exactly).
    acl = ss.closed_transition()
    b_sig = (ss.input_entry + ss.feedback_entry * ss.input_direct)[:, None]
    assert np.all(b_sig == 0.0)
    sys_sig = signal.dlti(acl, b_sig, ss.quantizer_tap[None, :], [[ss.input_direct]], dt=1)
    _, h = sys_sig.freqresp(2 * np.pi * f)
    np.testing.assert_allclose(h, 1.0, atol=1e-12)
    np.testing.assert_allclose(ss.signal_response(f), 1.0, atol=1e-12)
    # the NTF is the plain feedforward loop's
    back = loop.realized_ntf()
    assert np.max(np.abs(back.response(GRID) / ntf.response(GRID) - 1)) < 1e-9
    # scaling keeps the cancellation
    scaled = loop.rescaled(np.arange(1.0, order + 1.0) * 3.0)
    ls = scaled.linearized()
    assert np.all(ls.input_entry + ls.feedback_entry * ls.input_direct == 0.0)


def test_feed_in_only_for_feedforward():
    ntf = NoiseTransfer.designed(3, osr=64)
    for structure in ("feedback", "error-feedback"):
        with pytest.raises(ParameterError, match="input_feed_in"):
            LoopRealization.for_ntf(ntf, structure=structure, input_feed_in=True)
    assert not LoopRealization.for_ntf(ntf, structure="feedforward").input_feed_in
