import numpy as np
import pytest

from audiodsm.errors import ParameterError
from audiodsm.measure.alignment import find_delay, shift_by_frames


@pytest.mark.parametrize("delay", [0, 1, 37, 480, -5, -301])
def test_a_clip_delayed_by_known_frames_is_realigned_exactly(rng, delay):
    # the known delay is the reference: a pure shift of a broadband signal has its
    # cross-correlation peak at exactly that lag (Knapp and Carter 1976, eq. 2)
    n = 9600
    x = rng.standard_normal((n, 2))
    if delay >= 0:
        y = np.concatenate([np.zeros((delay, 2)), x])
    else:
        y = x[-delay:]
    est = find_delay(x, y)
    assert est.delay_frames == delay
    assert est.correlation == pytest.approx(1.0, abs=0.05)
    back = shift_by_frames(y, est.delay_frames, n)
    valid = slice(0, n) if delay >= 0 else slice(-delay, n)
    assert np.array_equal(back[valid], x[valid])


def test_delay_survives_noise_and_a_gain(rng):
    x = rng.standard_normal(20000)
    y = 0.3 * np.concatenate([np.zeros(123), x]) + 0.05 * rng.standard_normal(20123)
    est = find_delay(x, y)
    assert est.delay_frames == 123
    assert 0.9 < est.correlation < 1.0


def test_search_range_is_limited(rng):
    x = rng.standard_normal(5000)
    y = np.concatenate([np.zeros(900), x])
    assert find_delay(x, y, max_delay_frames=1000).delay_frames == 900
    assert find_delay(x, y, max_delay_frames=100).delay_frames != 900


def test_shift_pads_with_zeros():
    x = np.arange(1.0, 6.0)
    assert shift_by_frames(x, 2, 5).tolist() == [3.0, 4.0, 5.0, 0.0, 0.0]
    assert shift_by_frames(x, -2, 5).tolist() == [0.0, 0.0, 1.0, 2.0, 3.0]


def test_silence_and_empty_are_refused():
    with pytest.raises(ParameterError):
        find_delay(np.ones(10), np.zeros(10))
    with pytest.raises(ParameterError):
        find_delay(np.ones(10), np.zeros(0))
