"""Measurement along AES17 practice: weightings, band limits, spectra, metrics, idle tones."""
