"""Output stages: PDM, NRZ and PWM waveforms, and the bitstream exports."""

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from audiodsm.errors import AudioFileError, OutputError, ParameterError
from audiodsm.stages.output_stage import (
    PulseWaveform,
    level_codes,
    nrz_waveform,
    pdm_waveform,
    pwm_waveform,
)
from audiodsm.stages.stream_export import (
    CodeTextWriter,
    PackedBitsWriter,
    read_code_text,
    read_packed_bits,
    write_code_text,
    write_packed_bits,
)

RATE = 3.072e6


def _grid(levels, n, rng):
    return -1.0 + 2.0 * rng.integers(0, levels, n) / (levels - 1)


# --- PDM and NRZ ------------------------------------------------------------------------------


def test_pdm_waveform_holds_each_bit_for_one_frame(rng):
    bits = np.where(rng.random(100) < 0.5, -1.0, 1.0)
    wave = pdm_waveform(bits, frame_rate_hz=RATE, full_scale_volts=3.3)
    assert wave.ticks_per_frame == 1 and wave.levels.shape == (100, 1)
    np.testing.assert_array_equal(wave.levels[:, 0], 3.3 * bits)
    np.testing.assert_array_equal(wave.tick_samples(), 3.3 * bits)
    with pytest.raises(ParameterError, match="single-bit"):
        pdm_waveform(np.array([1.0, 0.5]), frame_rate_hz=RATE)
    with pytest.raises(ParameterError, match="single-bit"):
        pdm_waveform(np.array([1.0, np.nan]), frame_rate_hz=RATE)


def test_nrz_levels_are_code_times_lsb(rng):
    y = _grid(9, 50, rng)
    codes = level_codes(y, levels=9)
    assert codes.min() >= 0 and codes.max() <= 8
    wave = nrz_waveform(y, levels=9, frame_rate_hz=RATE, lsb_volts=0.25)
    # each level times the LSB, centred: (k - (levels - 1) / 2) * LSB
    np.testing.assert_allclose(wave.levels[:, 0], (codes - 4) * 0.25, rtol=0, atol=1e-15)
    # without an LSB: full-scale units, the input itself
    np.testing.assert_allclose(
        nrz_waveform(y, levels=9, frame_rate_hz=RATE).levels[:, 0], y, atol=1e-15
    )
    with pytest.raises(ParameterError, match="9-level grid"):
        nrz_waveform(np.array([0.1]), levels=9, frame_rate_hz=RATE)


@pytest.mark.parametrize("levels", [2, 3, 5, 9, 17, 65537])
def test_nrz_without_the_grid_check_gives_the_same_levels(levels, rng):
    # the chain's call (validate=False, a quantizer's own output) rounds to the same codes
    # and so gives the checked call's levels bit for bit, with and without an LSB in volts
    y = _grid(levels, 200, rng)
    for lsb in (None, 0.25, 1e-3):
        checked = nrz_waveform(y, levels=levels, frame_rate_hz=RATE, lsb_volts=lsb)
        fast = nrz_waveform(y, levels=levels, frame_rate_hz=RATE, lsb_volts=lsb, validate=False)
        assert np.array_equal(fast.levels, checked.levels)
        assert np.array_equal(fast.ticks, checked.ticks)
        assert not fast.levels.flags.writeable


def test_waveform_is_read_only_but_leaves_the_callers_arrays_alone():
    levels = np.zeros((3, 2))
    ticks = np.ones((3, 2), dtype=np.int64)
    wave = PulseWaveform(levels, ticks, 2, 1e3)
    assert not wave.levels.flags.writeable and not wave.ticks.flags.writeable
    levels[0, 0] = 1.0  # still writable for the caller
    assert ticks.flags.writeable


def test_waveform_checks_its_shape():
    with pytest.raises(ParameterError, match="ticks"):
        PulseWaveform(np.zeros((2, 2)), np.array([[1, 1], [2, 1]]), 2, 1e3)
    with pytest.raises(ParameterError, match="frame_rate_hz"):
        PulseWaveform(np.zeros((1, 1)), np.ones((1, 1)), 1, 0.0)


# --- PWM: slow per-tick reference ------------------------------------------------------------


def _slow_pwm(codes, steps, *, mode, carrier, bridge, sub, dead, min_ticks, action, volts):
    """Counter comparison tick by tick, written from the definitions in the docstring: the
    slow twin of the compiled kernel ``_waveform_kernels.pwm_segments`` (and of the code-level
    minimum-pulse rule around it).

    Trailing edge: a leg is high while the sawtooth counter (counter step = tick // sub) is
    below its code. Double-edge: an up-down counter; high while the tick is within code * sub
    ticks of the frame centre. Minimum pulse: per frame on the leg command's high and low
    time. Dead time: a leg is high only once its command has been high for dead + 1 ticks
    in a row (a rise delayed by `dead` ticks).
    """
    unit = sub * (1 if carrier == "trailing" else 2)
    frame = steps * unit
    dropped = stretched = 0
    adj = []
    for k in codes:
        k = int(k)
        if min_ticks and 0 < k * unit < min_ticks:
            if action == "drop":
                k, dropped = 0, dropped + 1
            else:
                k, stretched = math.ceil(min_ticks / unit), stretched + 1
        elif min_ticks and 0 < (steps - k) * unit < min_ticks:
            if action == "drop":
                k, dropped = steps, dropped + 1
            else:
                k, stretched = steps - math.ceil(min_ticks / unit), stretched + 1
        adj.append(k)

    def command(k, t):
        if carrier == "trailing":
            return t // sub < k
        centre = steps * sub
        return centre - k * sub <= t < centre + k * sub

    legs = 2 if bridge == "full" else 1
    runs = [0] * legs
    out = []
    actual = [[] for _ in range(legs)]
    for k in adj:
        for t in range(frame):
            cmd_a = command(k, t)
            if legs == 1:
                cmds = [cmd_a]
            elif mode == "two-level":
                cmds = [cmd_a, not cmd_a]
            else:
                cmds = [cmd_a, command(steps - k, t)]
            levels = []
            for i, c in enumerate(cmds):
                runs[i] = runs[i] + 1 if c else 0
                levels.append(runs[i] >= dead + 1)
                actual[i].append(levels[-1])
            if legs == 1:
                out.append(volts * (2.0 * levels[0] - 1.0))
            else:
                out.append(volts * (float(levels[0]) - float(levels[1])))
    transitions = []
    for seq in actual:
        prev, count = False, 0
        for v in seq:
            count += v != prev
            prev = v
        transitions.append(count)
    return np.array(out), dropped, stretched, transitions


CASES = [
    dict(mode="two-level", carrier="trailing", bridge="half"),
    dict(mode="two-level", carrier="trailing", bridge="full"),
    dict(mode="two-level", carrier="double-edge", bridge="half"),
    dict(mode="two-level", carrier="double-edge", bridge="full"),
    dict(mode="three-level", carrier="trailing", bridge="full"),
    dict(mode="three-level", carrier="double-edge", bridge="full"),
]


@pytest.mark.parametrize("case", CASES, ids=lambda c: f"{c['mode']}-{c['carrier']}-{c['bridge']}")
@pytest.mark.parametrize(
    ("sub", "dead", "min_ticks", "action"),
    [(1, 0, 0, "drop"), (2, 3, 0, "drop"), (1, 1, 2, "drop"), (2, 1, 3, "stretch")],
)
def test_pwm_equals_slow_tick_reference(case, sub, dead, min_ticks, action, rng):
    levels = 9
    y = _grid(levels, 120, rng)
    # runs of full-scale values exercise pulses that continue across frames
    y[10:14] = 1.0
    y[40:44] = -1.0
    wave, stats, _ = pwm_waveform(
        y,
        frame_rate_hz=384e3,
        levels=levels,
        tick_subdivision=sub,
        dead_time_ticks=dead,
        min_pulse_ticks=min_ticks,
        min_pulse_action=action,
        supply_volts=12.0,
        **case,
    )
    ref, dropped, stretched, transitions = _slow_pwm(
        level_codes(y, levels=levels),
        levels - 1,
        sub=sub,
        dead=dead,
        min_ticks=min_ticks,
        action=action,
        volts=12.0,
        **case,
    )
    np.testing.assert_array_equal(wave.tick_samples(), ref)
    assert (stats.dropped_pulses, stats.stretched_pulses) == (dropped, stretched)
    assert list(stats.transitions) == transitions
    seconds = y.size / 384e3
    assert stats.switching_events_per_s[0] == pytest.approx(transitions[0] / seconds)


@pytest.mark.parametrize("case", CASES, ids=lambda c: f"{c['mode']}-{c['carrier']}-{c['bridge']}")
def test_pwm_frame_mean_is_the_input_times_supply(case, rng):
    """First principles: a duty of (1 + y) / 2 between -V and +V (or the difference of two
    legs at (1 + y) / 2 and (1 - y) / 2) averages to y V over the frame."""
    y = _grid(17, 300, rng)
    wave, stats, _ = pwm_waveform(y, frame_rate_hz=384e3, levels=17, supply_volts=24.0, **case)
    np.testing.assert_allclose(wave.frame_means(), 24.0 * y, rtol=0, atol=1e-12)
    assert wave.ticks_per_frame == 16 * (1 if case["carrier"] == "trailing" else 2)
    assert stats.dropped_pulses == stats.stretched_pulses == 0


def test_counter_steps_alone_rounds_and_with_levels_scales(rng):
    y = np.array([-1.0, -0.3, 0.0, 0.41, 1.0])
    wave, _, _ = pwm_waveform(y, frame_rate_hz=1e5, counter_steps=10)
    np.testing.assert_allclose(wave.frame_means(), np.rint((y + 1) * 5) / 5 - 1, atol=1e-15)
    g = _grid(5, 20, rng)
    w8, _, _ = pwm_waveform(g, frame_rate_hz=1e5, levels=5, counter_steps=8)
    w4, _, _ = pwm_waveform(g, frame_rate_hz=1e5, levels=5)
    np.testing.assert_allclose(w8.frame_means(), w4.frame_means(), atol=1e-15)
    with pytest.raises(ParameterError, match="multiple of levels - 1"):
        pwm_waveform(g, frame_rate_hz=1e5, levels=5, counter_steps=6)


def test_pwm_blockwise_equals_one_shot(rng):
    y = _grid(9, 400, rng)
    y[99:103] = 1.0  # a run across the block boundary
    opts = dict(
        frame_rate_hz=384e3,
        levels=9,
        carrier="double-edge",
        tick_subdivision=4,
        dead_time_ticks=5,
        min_pulse_ticks=6,
        min_pulse_action="stretch",
    )
    whole, stats, end = pwm_waveform(y, **opts)
    pieces, state = [], None
    for lo, hi in ((0, 101), (101, 101), (101, 250), (250, 400)):
        w, _, state = pwm_waveform(y[lo:hi], state=state, **opts)
        pieces.append(w)
    assert np.array_equal(np.concatenate([p.levels for p in pieces]), whole.levels)
    assert np.array_equal(np.concatenate([p.ticks for p in pieces]), whole.ticks)
    assert state.totals == end.totals
    assert end.totals.stretched_pulses == stats.stretched_pulses


def test_min_pulse_counts_and_widths():
    # 17 levels, 16 steps; code 1 (y = -7/8) is a 1-tick pulse, code 15 a 1-tick gap
    y = np.array([-7 / 8, 7 / 8, 0.0])
    w, st, _ = pwm_waveform(y, frame_rate_hz=1e5, levels=17, bridge="half", min_pulse_ticks=2)
    assert st.dropped_pulses == 2
    np.testing.assert_allclose(w.frame_means(), [-1.0, 1.0, 0.0])
    w, st, _ = pwm_waveform(
        y,
        frame_rate_hz=1e5,
        levels=17,
        bridge="half",
        min_pulse_ticks=2,
        min_pulse_action="stretch",
    )
    assert st.stretched_pulses == 2
    np.testing.assert_allclose(w.frame_means(), [-0.75, 0.75, 0.0])


def test_dead_time_swallows_short_pulses():
    y = np.array([-0.75, -1.0, -0.75])  # 1-step pulses (9 levels, 8 steps)
    _, st, _ = pwm_waveform(y, frame_rate_hz=1e5, levels=9, bridge="half", dead_time_ticks=1)
    assert st.pulses_lost_to_dead_time == 2


def test_three_level_cancels_odd_carrier_harmonics_exactly():
    """REFERENCES.md: three-level ("BD") cancels the odd carrier groups of two-level ("AD").
    For a constant input the waveform is periodic in the frame; its odd harmonics vanish for a
    double-edge three-level stage (legs at (1 + y) / 2 and (1 - y) / 2 about the same centre:
    sin(pi m (1 + y) / 2) - sin(pi m (1 - y) / 2) = 2 cos(pi m / 2) sin(pi m y / 2) = 0 for odd
    m) and not for two-level."""
    y = np.full(4, 0.375)
    h = {}
    for mode in ("two-level", "three-level"):
        wave, _, _ = pwm_waveform(y, frame_rate_hz=1e5, levels=17, mode=mode, carrier="double-edge")
        x = wave.tick_samples()
        spec = np.abs(np.fft.rfft(x)) / x.size
        h[mode] = spec[4 * np.arange(1, 8)]  # harmonics m = 1..7 of the frame rate (4 frames)
    assert np.all(h["two-level"][0::2] > 1e-2)  # odd m present in two-level
    assert np.all(h["three-level"][0::2] < 1e-12)  # ... and cancelled in three-level
    assert h["three-level"][1] > 1e-2  # the even group m = 2 remains


@pytest.mark.parametrize(
    ("kwargs", "name"),
    [
        (dict(mode="four-level"), "mode"),
        (dict(carrier="leading"), "carrier"),
        (dict(mode="three-level", bridge="half"), "bridge"),
        (dict(dead_time_ticks=-1), "dead_time_ticks"),
        (dict(dead_time_ticks=99), "dead_time_ticks"),
        (dict(min_pulse_ticks=5), "min_pulse_ticks"),
        (dict(min_pulse_action="ignore"), "min_pulse_action"),
        (dict(supply_volts=0.0), "supply_volts"),
        (dict(tick_subdivision=0), "tick_subdivision"),
    ],
)
def test_pwm_bad_options(kwargs, name):
    with pytest.raises(ParameterError) as info:
        pwm_waveform(np.zeros(3), frame_rate_hz=1e5, levels=9, **kwargs)
    assert info.value.name == name
    with pytest.raises(ParameterError, match="levels/counter_steps"):
        pwm_waveform(np.zeros(3), frame_rate_hz=1e5)


# --- exports ----------------------------------------------------------------------------------


def test_packed_bits_round_trip_in_odd_blocks(tmp_path, rng):
    y = np.where(rng.random((1001, 2)) < 0.5, -1.0, 1.0)
    path = tmp_path / "stream.bits"
    with PackedBitsWriter(path, rate_hz=RATE, channels=2) as writer:
        for lo, hi in ((0, 3), (3, 3), (3, 500), (500, 1001)):
            writer.append(y[lo:hi])
        assert not path.exists()  # nothing under the final name before close
    back, info = read_packed_bits(path)
    np.testing.assert_array_equal(back, y)
    assert info["channels"] == 2 and info["samples_per_channel"] == 1001
    assert info["rate_hz"] == RATE
    # layout: interleaved, MSB first; compare the bytes with numpy's packbits (big bit order)
    expected = np.packbits((y.ravel() > 0).astype(np.uint8), bitorder="big")
    assert path.read_bytes() == expected.tobytes()
    assert info["padding_bits_at_end"] == (-2002) % 8
    assert json.loads((tmp_path / "stream.bits.json").read_text()) == info
    assert sorted(p.name for p in tmp_path.iterdir()) == ["stream.bits", "stream.bits.json"]


def test_packed_bits_first_sample_is_most_significant_bit(tmp_path):
    write_packed_bits(
        tmp_path / "a.bits", np.array([1.0, -1, -1, -1, -1, -1, -1, 1, 1]), rate_hz=1e6
    )
    assert (tmp_path / "a.bits").read_bytes() == bytes([0b10000001, 0b10000000])


def test_writers_leave_nothing_on_failure_and_refuse_overwrite(tmp_path):
    path = tmp_path / "s.bits"
    with pytest.raises(RuntimeError):
        with PackedBitsWriter(path, rate_hz=1e6) as writer:
            writer.append(np.ones(10))
            raise RuntimeError("interrupted")
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(ParameterError):
        with PackedBitsWriter(path, rate_hz=1e6) as writer:
            writer.append(np.array([1.0, 0.2]))
    assert list(tmp_path.iterdir()) == []
    write_packed_bits(path, np.ones(8), rate_hz=1e6)
    with pytest.raises(OutputError, match="already exists"):
        write_packed_bits(path, np.ones(8), rate_hz=1e6)
    write_packed_bits(path, -np.ones(8), rate_hz=1e6, overwrite=True)
    np.testing.assert_array_equal(read_packed_bits(path)[0][:, 0], -np.ones(8))
    with pytest.raises(OutputError, match="does not exist"):
        write_packed_bits(tmp_path / "missing" / "x.bits", np.ones(8), rate_hz=1e6)


def test_reader_rejects_truncated_files(tmp_path):
    path = tmp_path / "t.bits"
    write_packed_bits(path, np.ones(100), rate_hz=1e6)
    path.write_bytes(path.read_bytes()[:-3])
    with pytest.raises(AudioFileError, match="bytes"):
        read_packed_bits(path)
    side = tmp_path / "t.bits.json"
    info = json.loads(side.read_text())
    del info["channels"]
    side.write_text(json.dumps(info))
    with pytest.raises(AudioFileError, match="channels"):
        read_packed_bits(path)
    side.write_text("{not json")
    with pytest.raises(AudioFileError, match="JSON"):
        read_packed_bits(path)


def test_code_text_round_trip_and_word_format(tmp_path, rng):
    y = np.array([[1.0, -1.0], [-1.0, -1.0], [1.0, 1.0]])
    path = tmp_path / "bits.txt"
    write_code_text(path, y)
    assert path.read_text() == "10\n00\n11\n"
    np.testing.assert_array_equal(read_code_text(path, channels=2), y)
    # multi-level codes: 5 levels -> 3 binary digits per channel, code 4 = "100"
    y5 = _grid(5, 200, rng)
    path5 = tmp_path / "codes.txt"
    with CodeTextWriter(path5, levels=5) as writer:
        writer.append(y5[:77])
        writer.append(y5[77:])
    lines = path5.read_text().splitlines()
    assert lines[0] == format(int(level_codes(y5[0], levels=5)), "03b")
    np.testing.assert_allclose(read_code_text(path5, levels=5)[:, 0], y5, atol=1e-15)
    path5.write_text("102\n")
    with pytest.raises(AudioFileError, match="other than 0 or 1"):
        read_code_text(path5, levels=5)


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    case=st.sampled_from(CASES),
    sub=st.integers(1, 3),
    dead=st.integers(0, 8),
    min_ticks=st.integers(0, 4),
    action=st.sampled_from(["drop", "stretch"]),
    cuts=st.lists(st.integers(0, 60), max_size=4),
)
def test_pwm_any_block_split_equals_one_shot(seed, case, sub, dead, min_ticks, action, cuts):
    rng = np.random.default_rng(seed)
    y = _grid(9, 60, rng)  # 8 steps: dead <= 8 <= frame, min_ticks <= 4 <= frame / 2
    opts = dict(
        frame_rate_hz=1e5,
        levels=9,
        tick_subdivision=sub,
        dead_time_ticks=dead,
        min_pulse_ticks=min_ticks,
        min_pulse_action=action,
        **case,
    )
    whole, _, end = pwm_waveform(y, **opts)
    state, parts = None, []
    bounds = [0, *sorted(cuts), 60]
    for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
        w, _, state = pwm_waveform(y[lo:hi], state=state, **opts)
        parts.append(w.tick_samples())
    assert np.array_equal(np.concatenate(parts), whole.tick_samples())
    assert state.totals == end.totals


def test_pdm_waveform_without_validation_is_the_same_waveform(rng):
    # First principles: skipping the input check must not change the waveform of a valid
    # single-bit stream, and the caller's array stays writable (the waveform holds a view).
    y = np.where(rng.random(1000) < 0.5, -1.0, 1.0)
    for volts in (1.0, 2.5):
        checked = pdm_waveform(y, frame_rate_hz=3.072e6, full_scale_volts=volts)
        trusted = pdm_waveform(y, frame_rate_hz=3.072e6, full_scale_volts=volts, validate=False)
        assert np.array_equal(checked.levels, trusted.levels)
        assert np.array_equal(checked.ticks, trusted.ticks)
        assert trusted.ticks_per_frame == 1 and trusted.frame_rate_hz == 3.072e6
        assert not trusted.levels.flags.writeable
    assert y.flags.writeable
