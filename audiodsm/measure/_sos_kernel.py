"""The compiled loop of the measurement filters (second-order sections), and nothing else.

``@njit(cache=True, nogil=True)`` without fastmath, like the stage kernels
(:mod:`audiodsm.stages._kernels`): the sums are taken in the order written, so the loop gives
the numbers of ``scipy.signal.sosfilt`` bit for bit (a test compares the two). It lets a
render's silence meter filter its output without importing ``scipy.signal`` (about a second of
CPU at import).
"""

from __future__ import annotations

from numba import njit


@njit(cache=True, nogil=True)
def sos_cascade(sos, x, zi):
    """Filter each row of ``x`` in place through the sections ``sos``, delays ``zi`` in place.

    Parameters
    ----------
    sos : float64 (n_sections, 6)
        Rows ``b0, b1, b2, a0, a1, a2`` with ``a0 = 1``.
    x : float64 (n_signals, n_samples), C-contiguous
        Signals, one a row; overwritten with the output.
    zi : float64 (n_signals, n_sections, 2), C-contiguous
        Section delays (transposed direct form II), updated in place.

    References
    ----------
    SciPy 1.17 ``scipy.signal.sosfilt`` (``_sosfilt.pyx``): per sample and section,
    ``y = b0 x + z0``, ``z0 = b1 x - a1 y + z1``, ``z1 = b2 x - a2 y``; the same operations in
    the same order here (from memory of that source; the test against scipy checks it).
    """
    n_signals = x.shape[0]
    n_samples = x.shape[1]
    n_sections = sos.shape[0]
    for i in range(n_signals):
        for n in range(n_samples):
            x_cur = x[i, n]
            for s in range(n_sections):
                x_new = sos[s, 0] * x_cur + zi[i, s, 0]
                zi[i, s, 0] = sos[s, 1] * x_cur - sos[s, 4] * x_new + zi[i, s, 1]
                zi[i, s, 1] = sos[s, 2] * x_cur - sos[s, 5] * x_new
                x_cur = x_new
            x[i, n] = x_cur
