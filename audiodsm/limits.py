"""The numeric limits of the design settings, defined once.

The profile schema (:mod:`audiodsm.profile`), the design library and the ``audiodsm design``
command all read their ranges from here, so a profile key and the command-line option that
writes it always accept the same values.

Ranges are inclusive ``(low, high)`` pairs unless the name says otherwise.
"""

from __future__ import annotations

__all__ = [
    "AUDIO_RATES_HZ",
    "CUTOFF_HZ_RANGE",
    "DESIGN_OSR_RANGE",
    "ELEMENT_MISMATCH_RANGE",
    "ELEMENT_SELECTIONS",
    "FILTER_ORDER_RANGE",
    "LEVELS_RANGE",
    "ORDER_RANGE",
    "OSR_CHOICES",
    "OUT_OF_BAND_GAIN_RANGE",
    "PARTS_RANGE",
    "TARGET_DYNAMIC_RANGE_DB",
    "ZERO_LAYOUTS",
]

#: Audio sample rates the chain accepts at its input and writes for listening (Hz).
AUDIO_RATES_HZ = (44100, 48000, 88200, 96000, 176400, 192000)

#: Loop order of an NTF (designed or given by its roots).
ORDER_RANGE = (1, 8)

#: Oversampling ratios the NTF design accepts (any number in this range).
DESIGN_OSR_RANGE = (4, 1024)

#: Oversampling ratios a chain profile may use: the powers of two the upsampler builds.
OSR_CHOICES = (16, 32, 64, 128, 256, 512)

#: Quantizer levels: 2 (single bit) to 2**24 (a 24-bit quantizer).
LEVELS_RANGE = (2, 1 << 24)

#: Largest out-of-band NTF gain of a profile's design: above the low end (open), at most the
#: high end. The NTF design itself only needs a gain above 1.
OUT_OF_BAND_GAIN_RANGE = (1.0, 8.0)

#: Where the designed NTF puts its zeros: spread over the band, or all at DC.
ZERO_LAYOUTS = ("spread", "dc")

#: Order of an analog prototype reconstruction filter.
FILTER_ORDER_RANGE = (1, 6)

#: Corner frequency of an analog prototype reconstruction filter (Hz).
CUTOFF_HZ_RANGE = (20000.0, 1e7)

#: Dynamic-range targets the design search accepts (dB).
TARGET_DYNAMIC_RANGE_DB = (20.0, 250.0)

#: Element-selection methods of a multi-level DAC's unit elements (stages/elements.py).
ELEMENT_SELECTIONS = (
    "thermometer",
    "random",
    "data-weighted",
    "bidirectional-weighted",
    "vector-second-order",
)

#: Relative standard deviation of one unit element's weight (0.1 = 10 %).
ELEMENT_MISMATCH_RANGE = (0.0, 0.1)

#: Parts (Monte Carlo draws of the random impairments) one profile may run: each part is a
#: whole battery, so the top end keeps a batch's memory (every part's readings are held for
#: the spread) and time bounded.
PARTS_RANGE = (1, 1000)
