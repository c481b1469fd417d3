"""The on-disk cache of the chain's modulator designs, and the cold-cache check."""

import numpy as np
import pytest

from audiodsm.profile import ChainProfile
from audiodsm.stages import chain_build as chain_mod
from audiodsm.stages import loop_cache
from audiodsm.stages.chain import Chain
from audiodsm.stages.modulator import Modulator


@pytest.fixture
def cache_home(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path))
    monkeypatch.delenv("AUDIODSM_LOOP_CACHE", raising=False)
    return tmp_path


def test_folder_follows_xdg_and_can_be_turned_off(cache_home, monkeypatch):
    # the XDG Base Directory Specification: user cache files under $XDG_CACHE_HOME
    assert loop_cache.cache_folder() == cache_home / "audiodsm" / "loops"
    monkeypatch.delenv("XDG_CACHE_HOME")
    assert loop_cache.cache_folder().parts[-3:] == (".cache", "audiodsm", "loops")
    monkeypatch.setenv("AUDIODSM_LOOP_CACHE", str(cache_home / "elsewhere"))
    assert loop_cache.cache_folder() == cache_home / "elsewhere"
    monkeypatch.setenv("AUDIODSM_LOOP_CACHE", "off")
    assert loop_cache.cache_folder() is None
    loop_cache.store("thing", (1, 2.0), "value")
    assert loop_cache.load("thing", (1, 2.0)) is None


def test_store_then_load_and_bad_entries_are_ignored(cache_home):
    value = {"a": np.arange(3.0)}
    assert loop_cache.load("thing", (1, b"x")) is None
    loop_cache.store("thing", (1, b"x"), value)
    back = loop_cache.load("thing", (1, b"x"))
    np.testing.assert_array_equal(back["a"], value["a"])
    assert loop_cache.load("thing", (2, b"x")) is None  # another key
    assert loop_cache.load("other", (1, b"x")) is None  # another kind
    files = list((cache_home / "audiodsm" / "loops").iterdir())
    assert len(files) == 1 and not files[0].name.startswith(".tmp")
    files[0].write_bytes(b"not a pickle")
    assert loop_cache.load("thing", (1, b"x")) is None


def test_a_chain_reads_its_scaled_loop_back_instead_of_searching(cache_home, monkeypatch):
    profile = ChainProfile(name="cached")
    chain_mod._SCALED_LOOPS.clear()
    chain_mod._designed_ntf.cache_clear()
    first = Chain.from_profile(profile, 48000, 1)
    assert any(
        p.name.startswith("scaled-loop-") for p in (cache_home / "audiodsm" / "loops").iterdir()
    )

    def no_search(*args, **kwargs):
        raise AssertionError("the stability search ran again")

    chain_mod._SCALED_LOOPS.clear()
    chain_mod._designed_ntf.cache_clear()
    monkeypatch.setattr(Modulator, "with_scaled_states", no_search)
    again = Chain.from_profile(profile, 48000, 1)
    assert again.modulator.loop is not first.modulator.loop
    for name in ("feedback", "chain_gain", "resonator", "state_scale", "output_weight"):
        np.testing.assert_array_equal(
            getattr(again.modulator.loop, name), getattr(first.modulator.loop, name)
        )
    np.testing.assert_array_equal(again.ntf.poles, first.ntf.poles)
    np.testing.assert_array_equal(
        again.state_scaling_probe.state_peaks, first.state_scaling_probe.state_peaks
    )
    x = 0.3 * np.sin(np.arange(2000) * 0.05)
    np.testing.assert_array_equal(again.process(x)[0].listening, first.process(x)[0].listening)


def test_compiled_loops_missing_answers_from_the_cache_files():
    # the kernels module's loops compiled in this test session are on disk by now
    from audiodsm.stages import _kernels

    _kernels.loop_any_structure(
        np.zeros(4),
        np.empty(4),
        np.zeros((6, 1)),
        np.zeros(1),
        np.zeros(1, np.uint64),
        np.zeros(1),
        np.zeros(1, np.int64),
        0,
        2,
        0.0,
        8.0,
        1e6,
        True,
        np.empty((0, 1)),
    )
    assert loop_cache.compiled_loops_missing() is False


def test_designs_are_read_back_from_disk_unchanged(cache_home, monkeypatch):
    # every design a render needs is remembered on disk (audiodsm/disk_cache.py); a process
    # whose in-memory caches are empty reads them back, the same numbers, arrays read-only
    from audiodsm.measure import bands, weighting
    from audiodsm.stages import downsample, filter_design, upsample

    def clear():
        for fn in (
            upsample._design_upsampler_cached,
            downsample._design_downsampler_cached,
            bands._design,
            weighting._design,
        ):
            fn.cache_clear()

    def build():
        return (
            upsample.design_upsampler(48000, 64),
            downsample.design_downsampler(3072000, 48000),
            filter_design.analog_prototype("butterworth", order=3, cutoff_hz=60000.0),
            bands.band_limit_filter(48000.0),
            weighting.weighting_filter("a", 48000.0),
        )

    clear()
    first = build()

    def no_design(*args, **kwargs):
        raise AssertionError("a design ran again")

    for module, name in [
        (upsample, "_design_upsampler_fresh"),
        (downsample, "_design_downsampler_fresh"),
        (filter_design, "_unit_prototype"),
        (bands, "_design_sections"),
        (weighting, "_fitted_design"),
    ]:
        monkeypatch.setattr(module, name, no_design)
    clear()
    again = build()
    up, down, analog = again[:3]
    assert up is not first[0]
    for name in ("compensator_taps", "final_taps", "final_image_levels_db"):
        np.testing.assert_array_equal(getattr(up, name), getattr(first[0], name))
        assert not getattr(up, name).flags.writeable
    for mine, theirs in zip(up.halfband_taps, first[0].halfband_taps, strict=True):
        np.testing.assert_array_equal(mine, theirs)
        assert not mine.flags.writeable
    np.testing.assert_array_equal(down.rational_taps, first[1].rational_taps)
    assert not down.rational_taps.flags.writeable
    assert down.delay_seconds == first[1].delay_seconds
    for name in ("a", "b", "c", "d"):
        np.testing.assert_array_equal(getattr(analog, name), getattr(first[2], name))
    np.testing.assert_array_equal(again[3], first[3])
    np.testing.assert_array_equal(again[4], first[4])
