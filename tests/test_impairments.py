"""The [impairments] section: profile keys, refusals, and the chain with impaired stages."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest
from profile_helpers import assert_refused_at_load
from scipy.signal import welch

from audiodsm.errors import ProfileError
from audiodsm.profile import ImpairmentSettings, load_profile, parse_profile
from audiodsm.profile_text import profile_digest
from audiodsm.stages.chain import Chain

ROOT = Path(__file__).resolve().parents[1]
NRZ17 = ROOT / "profiles" / "dac_chip" / "nrz17_64x.toml"


def _with(profile, **keys):
    return dataclasses.replace(
        profile, impairments=dataclasses.replace(profile.impairments, **keys)
    )


def _tone(n, rate_hz, level=0.5, freq_hz=997.0):
    return level * np.sin(2 * np.pi * freq_hz * np.arange(n) / rate_hz)


def test_default_section_changes_no_digest():
    profile = load_profile(NRZ17)
    assert not profile.impairments.active
    assert profile_digest(profile) == profile_digest(_with(profile, element_mismatch=0.0))
    assert profile_digest(profile) != profile_digest(_with(profile, element_mismatch=0.001))


@pytest.mark.parametrize(
    ("text", "key", "words"),
    [
        ("element_mismatch = -0.001", "impairments.element_mismatch", "from 0 to 0.1"),
        ("element_mismatch = 0.5", "impairments.element_mismatch", "from 0 to 0.1"),
        ("jitter_rms_s = -1e-12", "impairments.jitter_rms_s", "from 0 to 1e-6"),
        ("element_selection = 'shuffle'", "impairments.element_selection", "'data-weighted'"),
        ("noise_density_nv = -3.0", "impairments.noise_density_nv", "from 0 to 1e6"),
        ("jitter_sine_peak_s = 1e-11", "impairments.jitter_sine_hz", "together"),
    ],
)
def test_out_of_range_keys_refused_at_load(tmp_path, text, key, words):
    path = tmp_path / "bad.toml"
    path.write_text(NRZ17.read_text() + f"\n[impairments]\n{text}\n")
    assert_refused_at_load(path, key, words)


def test_element_keys_need_unit_elements():
    text = "[output]\nkind = 'pdm'\n[impairments]\nelement_selection = 'random'\n"
    with pytest.raises(ProfileError, match="impairments.element_selection"):
        parse_profile(text)


@pytest.mark.parametrize("method", ["random", "data-weighted", "vector-second-order"])
def test_chain_with_ideal_elements_is_the_ideal_chain(method):
    # zero mismatch: whichever elements are chosen, the output is the ideal one, bit for bit
    profile = load_profile(NRZ17)
    x = _tone(4000, 48000)
    ideal = Chain.from_profile(profile, 48000, 1).process(x)[0].listening
    chain = Chain.from_profile(_with(profile, element_selection=method), 48000, 1)
    assert np.array_equal(chain.process(x)[0].listening, ideal)


def test_chain_mismatch_shaping_lowers_in_band_error():
    # the chain's error path (output minus the ideal loop output) with 1 % mismatch: fixed
    # (thermometer) selection leaves the mismatch in band as distortion, first-order shaping
    # (DWA, Baird & Fiez 1995) moves most of it out of band
    profile = _with(load_profile(NRZ17), element_mismatch=0.01, part_seed=4)
    x = _tone(48000, 48000)
    power = {}
    for method in ("thermometer", "data-weighted"):
        chain = Chain.from_profile(_with(profile, element_selection=method), 48000, 1)
        err = chain.process(x, keep=("error",))[0].error[8000:, 0]
        power[method] = 10 * np.log10(np.mean(err**2))
    assert power["data-weighted"] < power["thermometer"] - 20.0, power


def test_impairment_settings_default_is_ideal():
    assert not ImpairmentSettings().active
    assert ImpairmentSettings(jitter_rms_s=1e-12).active


def _band_power(x, rate_hz, band_hz):
    freqs, psd = welch(x, fs=rate_hz, nperseg=1 << 13)
    return float(np.sum(psd[freqs <= band_hz]) * (freqs[1] - freqs[0]))


def test_white_analog_noise_adds_its_band_power():
    # white noise of one-sided density D adds D^2 B in a band B (definition of a spectral
    # density); referred to full scale through the chain's calibrated gain (volts per unit)
    rate, band, density_nv = 48000, 20000.0, 2000.0
    profile = load_profile(NRZ17)
    x = _tone(1 << 16, rate, level=0.1)
    quiet = Chain.from_profile(profile, rate, 1)
    noisy = Chain.from_profile(_with(profile, noise_density_nv=density_nv, part_seed=3), rate, 1)
    skip = 4096  # past the filters' start-up
    base = _band_power(quiet.process(x, keep=("error",))[0].error[skip:, 0], rate, band)
    got = _band_power(noisy.process(x, keep=("error",))[0].error[skip:, 0], rate, band) - base
    want = (density_nv * 1e-9) ** 2 * band / noisy.gain**2
    assert abs(10 * np.log10(got / want)) <= 0.1, (got, want)


def test_jitter_keeps_the_error_path_aligned_and_streams():
    # the jitter stage runs a frame behind; the ideal path is delayed alike, so a negligible
    # jitter leaves the error path as it was (a misaligned frame would show the signal's
    # first difference, 0.5 * 2 pi 997 / 3.072e6 ~ 1e-3; the delay of the error itself by one
    # modulator frame moves it by about 2 pi 20e3 / 3.072e6 of its ~1e-6 size)
    profile = load_profile(NRZ17)
    x = _tone(8000, 48000)
    ref = Chain.from_profile(profile, 48000, 1).process(x, keep=("error",))[0].error
    chain = Chain.from_profile(_with(profile, jitter_rms_s=1e-18), 48000, 1)
    whole = chain.process(x, keep=("error", "listening"))[0]
    assert np.max(np.abs(whole.error[2000:] - ref[2000:])) < 1e-6
    first, st = chain.process(x[:3001], keep=("listening",))
    second, _ = chain.process(x[3001:], st, keep=("listening",))
    assert np.array_equal(np.concatenate([first.listening, second.listening]), whole.listening)


def test_chain_refuses_jitter_beyond_half_a_frame():
    profile = _with(load_profile(NRZ17), jitter_rms_s=5e-7)
    with pytest.raises(ProfileError, match="half the output period"):
        Chain.from_profile(profile, 48000, 1)


@pytest.fixture(scope="module")
def jitter_readings():
    from audiodsm.evaluate.battery import BatteryPlan, run_battery

    out = {}
    for name in ("nrz17_64x", "pdm2_64x"):
        profile = load_profile(ROOT / "profiles" / "dac_chip" / f"{name}.toml")
        res = run_battery(profile, tests=("dynamic_range",), plan=BatteryPlan.quick())
        out[name] = (profile, res.metrics["jitter_noise_dbfs_at_1ps"])
    return out


def test_battery_jitter_reading_predicts_the_jittered_chain(jitter_readings):
    # the battery's reading (textbook estimate from the mean squared step, Schreier & Temes
    # 2005) against the chain with 100 ps rms white jitter on its edges: the added in-band
    # noise (error path, 20 Hz..20 kHz) is the reading + 20 log10(100), within 1 dB
    profile, reading = jitter_readings["nrz17_64x"]
    rate, sigma = 48000, 100e-12
    x = _tone(1 << 16, rate, level=1e-3)
    quiet = Chain.from_profile(profile, rate, 1)
    jittery = Chain.from_profile(_with(profile, jitter_rms_s=sigma, part_seed=2), rate, 1)
    skip = 4096
    base = _band_power(quiet.process(x, keep=("error",))[0].error[skip:, 0], rate, 20000.0)
    noisy = _band_power(jittery.process(x, keep=("error",))[0].error[skip:, 0], rate, 20000.0)
    got_dbfs = 10 * np.log10((noisy - base) / 0.5)
    assert abs(got_dbfs - (reading + 20 * np.log10(sigma / 1e-12))) <= 1.0, (got_dbfs, reading)


def test_single_bit_stream_reads_more_jitter_sensitive(jitter_readings):
    # a single-bit stream steps by 2 full scale, a 17-level loop by a few eighths: its jitter
    # noise is lower by their mean squared step ratio (Schreier & Temes 2005)
    assert jitter_readings["pdm2_64x"][1] > jitter_readings["nrz17_64x"][1] + 15.0


def test_supply_ripple_sidebands_follow_amplitude_modulation():
    # open loop: output = duty cycle x supply V (1 + m sin(w_r t)); a tone A sin(w t) gains
    # sidebands at f +- f_r of A m / 2 each, 20 log10(m / 2) re the tone (amplitude
    # modulation theory), within 0.3 dB. Coherent bins at the 48 kHz listening rate.
    rate, n = 48000, 1 << 16
    f, f_r, m = 151 * rate / n, 37 * rate / n, 0.05  # ~111 Hz and ~27 Hz: in the flat band
    profile = load_profile(ROOT / "profiles" / "pocket_amp" / "pwm9_bridge_16x.toml")
    chain = Chain.from_profile(
        _with(profile, supply_ripple=m, supply_ripple_hz=f_r), rate, 1, listening_rate_hz=rate
    )
    x = 0.5 * np.sin(2 * np.pi * f * np.arange(2 * n) / rate)
    y = chain.process(x)[0].listening[n:, 0]
    spectrum = np.abs(np.fft.rfft(y * np.hanning(n)))
    want = 20 * np.log10(m / 2)
    for side in (151 - 37, 151 + 37):
        got = 20 * np.log10(spectrum[side] / spectrum[151])
        assert abs(got - want) <= 0.3, (side, got, want)


def test_supply_ripple_only_on_pwm_and_given_with_its_frequency():
    with pytest.raises(ProfileError, match="impairments.supply_ripple"):
        parse_profile("[impairments]\nsupply_ripple = 0.1\nsupply_ripple_hz = 100.0\n")
    text = NRZ17.read_text().replace('kind = "nrz"', 'kind = "pwm"')
    with pytest.raises(ProfileError, match="impairments.supply_ripple_hz"):
        parse_profile(text + "\n[impairments]\nsupply_ripple = 0.1\n")
    with pytest.raises(ProfileError, match="from 0 to 0.99"):
        parse_profile(text + "\n[impairments]\nsupply_ripple = 1.2\nsupply_ripple_hz = 100.0\n")


def test_supply_ripple_streams():
    profile = load_profile(ROOT / "profiles" / "pocket_amp" / "pwm9_bridge_16x.toml")
    chain = Chain.from_profile(_with(profile, supply_ripple=0.1, supply_ripple_hz=120.0), 48000, 1)
    x = _tone(4000, 48000)
    whole = chain.process(x)[0].listening
    first, st = chain.process(x[:1234])
    second, _ = chain.process(x[1234:], st)
    assert np.array_equal(np.concatenate([first.listening, second.listening]), whole)
