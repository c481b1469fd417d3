"""Synthesize the demo program material (seeded, so every run writes the same samples).

Four short mono clips at 48 kHz, 24-bit WAV, all made from scratch here:

``plucked_and_sustained.wav``
    Plucked notes (Karplus-Strong string model) over a sustained three-note chord.
``bass_line.wav``
    A low bass line: band-limited sawtooth notes with a soft attack and release.
``fade_to_silence.wav``
    A sustained chord fading slowly (exponentially in level, 60 dB over the clip) into
    digital silence; the last half second is exact zeros. Fades are where idle tones and
    noise modulation become audible.
``quiet_passage.wav``
    A melody of plucked notes peaking near -60 dBFS: low-level linearity and the noise
    floor are what one hears here.

Run ``python audio_demo/make_demo_audio.py [FOLDER]`` (default: the folder of this script).
The clips are the demo's only audio; they imitate no recording.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

RATE_HZ = 48000
SEED = 20261201
CLIP_NAMES = (
    "plucked_and_sustained.wav",
    "bass_line.wav",
    "fade_to_silence.wav",
    "quiet_passage.wav",
)


def _hz(midi_note: float) -> float:
    """Equal-tempered frequency of a MIDI note number (A4 = note 69 = 440 Hz)."""
    return 440.0 * 2.0 ** ((midi_note - 69) / 12.0)


def pluck(freq_hz, seconds, rng, *, rate_hz=RATE_HZ, damping=0.996):
    """One plucked string: the Karplus-Strong loop (a delay line with a two-point average).

    K. Karplus and A. Strong, "Digital Synthesis of Plucked-String and Drum Timbres",
    Computer Music Journal 7(2), 1983.
    """
    n = int(seconds * rate_hz)
    period = max(2, int(round(rate_hz / freq_hz)))
    line = rng.uniform(-1.0, 1.0, period)
    line -= line.mean()
    out = np.empty(n)
    prev = 0.0
    for i in range(n):  # short clips: a plain loop is fast enough here
        k = i % period
        current = line[k]
        out[i] = current
        line[k] = damping * 0.5 * (current + prev)
        prev = current
    return out


def _envelope(n, attack, release):
    env = np.ones(n)
    a, r = int(attack * RATE_HZ), int(release * RATE_HZ)
    env[:a] = np.linspace(0.0, 1.0, a, endpoint=False)
    if r:
        env[-r:] *= np.linspace(1.0, 0.0, r)
    return env


def _saw(freq_hz, n):
    """A band-limited sawtooth: harmonics up to 8 kHz, amplitudes 1/k."""
    t = np.arange(n) / RATE_HZ
    out = np.zeros(n)
    for k in range(1, int(8000.0 / freq_hz) + 1):
        out += np.sin(2 * np.pi * k * freq_hz * t) / k
    return out * (2.0 / np.pi)


def _chord(notes, n, *, vibrato_hz=5.0):
    t = np.arange(n) / RATE_HZ
    out = np.zeros(n)
    for j, note in enumerate(notes):
        f = _hz(note)
        wobble = 0.002 * np.sin(2 * np.pi * vibrato_hz * t + j)
        phase = 2 * np.pi * f * np.cumsum(1.0 + wobble) / RATE_HZ
        out += np.sin(phase) + 0.3 * np.sin(2 * phase) + 0.1 * np.sin(3 * phase)
    return out / len(notes)


def _peak_to(x, level_dbfs):
    return x * (10.0 ** (level_dbfs / 20.0) / np.max(np.abs(x)))


def plucked_and_sustained(rng, seconds=3.0):
    n = int(seconds * RATE_HZ)
    out = 0.35 * _chord((57, 60, 64), n) * _envelope(n, 0.3, 0.4)
    for k, note in enumerate((69, 72, 76, 74, 72, 79)):
        start = int((0.15 + 0.45 * k) * RATE_HZ)
        tone = pluck(_hz(note), seconds - start / RATE_HZ, rng)
        out[start : start + tone.size] += 0.6 * tone
    return _peak_to(out, -3.0)


def bass_line(rng, seconds=3.0):
    n = int(seconds * RATE_HZ)
    out = np.zeros(n)
    step = int(0.375 * RATE_HZ)
    for k, note in enumerate((28, 28, 31, 33, 28, 35, 33, 31)):
        start = k * step
        if start >= n:
            break
        m = min(step, n - start)
        out[start : start + m] += _saw(_hz(note), m) * _envelope(m, 0.01, 0.08)
    out += 1e-4 * rng.standard_normal(n)  # a little room noise
    return _peak_to(out, -6.0)


def fade_to_silence(rng, seconds=3.5, silent_s=0.5):
    n = int(seconds * RATE_HZ)
    sound = n - int(silent_s * RATE_HZ)
    out = np.zeros(n)
    chord = 0.5 * _chord((48, 55, 64, 67), sound)
    fade_db = np.linspace(0.0, -60.0, sound)  # 60 dB over the clip
    out[:sound] = chord * 10.0 ** (fade_db / 20.0) * _envelope(sound, 0.05, 0.2)
    return _peak_to(out, -6.0)


def quiet_passage(rng, seconds=3.0):
    n = int(seconds * RATE_HZ)
    out = np.zeros(n)
    for k, note in enumerate((76, 74, 72, 71, 72, 67)):
        start = int(0.45 * k * RATE_HZ)
        tone = pluck(_hz(note), seconds - start / RATE_HZ, rng, damping=0.994)
        out[start : start + tone.size] += tone
    return _peak_to(out, -60.0)


def make_clips(seed=SEED) -> dict:
    """Every clip as ``{file name: float64 samples}`` (mono, 48 kHz, full scale ±1.0)."""
    rng = np.random.default_rng(seed)
    makers = (plucked_and_sustained, bass_line, fade_to_silence, quiet_passage)
    return {name: fn(rng) for name, fn in zip(CLIP_NAMES, makers, strict=True)}


def write_clips(folder, *, overwrite=True) -> list:
    """Write the clips as 24-bit WAV files into ``folder``; return the paths."""
    from audiodsm.io import write_audio_atomic

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    return [
        write_audio_atomic(folder / name, x, RATE_HZ, subtype="PCM_24", overwrite=overwrite)
        for name, x in make_clips().items()
    ]


if __name__ == "__main__":
    target = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).resolve().parent
    for path in write_clips(target):
        print(path)
