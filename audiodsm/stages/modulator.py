"""The delta-sigma modulator stage: a realized loop, its quantizer, dither and overload guard.

:class:`Modulator` runs the compiled loops of :mod:`audiodsm.stages._kernels` over audio at the
modulator rate, block by block with explicit state. :meth:`Modulator.probe_stability` searches
the largest input sine the loop handles, and :meth:`Modulator.with_scaled_states` rescales the
integrators for it.
"""

from __future__ import annotations

import functools
import hashlib
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.design.realize import STRUCTURES, LoopRealization
from audiodsm.errors import ParameterError
from audiodsm.limits import LEVELS_RANGE
from audiodsm.stages import _kernels

__all__ = [
    "GUARD_ACTIONS",
    "Modulator",
    "ModulatorState",
    "STABILITY_BAND_FRACTIONS",
    "STABILITY_RUN_SAMPLES",
    "StabilityProbe",
]

GUARD_ACTIONS = ("reset", "clamp")
#: runs shorter than this (samples per channel) may use a more general kernel (see __init__)
_SHORT_RUN = 1 << 16
_GOLDEN = 0x9E3779B97F4A7C15
_MASK = (1 << 64) - 1
STABILITY_RUN_SAMPLES = 1 << 20  # samples per run of the stability search
STABILITY_BAND_FRACTIONS = (0.1, 0.45, 0.9)  # its test frequencies, fractions of the band edge
_PROBES: dict = {}  # stability searches done in this process, by loop and settings
_PROBES_MAX = 64


_POOLS: dict[int, ThreadPoolExecutor] = {}


def _thread_pool() -> ThreadPoolExecutor:
    """One worker thread per core, shared by all modulators of this process.

    Keyed by process id: a pool inherited through ``fork`` has no live threads in the child.
    The kernels release the GIL, so channels really run in parallel.
    """
    pool = _POOLS.get(os.getpid())
    if pool is None:
        pool = ThreadPoolExecutor(max_workers=os.cpu_count() or 1, thread_name_prefix="modulator")
        _POOLS[os.getpid()] = pool
    return pool


def _splitmix(value: int) -> int:
    """SplitMix64 output function on a Python int (used to derive per-channel seeds)."""
    z = value & _MASK
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK
    return z ^ (z >> 31)


def _readonly(a: np.ndarray) -> np.ndarray:
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


def _kernel_key(loop: LoopRealization) -> tuple[str, int, bool, bool, int] | None:
    """Which specialised kernel fits ``loop``: (structure, order, lossless, unit chain, pairs).

    None when no specialised kernel applies (a feedforward loop whose quantizer output reaches
    more than the first integrator); the generic loop runs it then.
    """
    n = loop.order
    if loop.structure == "feedforward" and np.any(loop.feedback[1:] != 0.0):
        return None
    lossless = bool(np.all(loop.leak == 1.0))
    unit_chain = bool(np.all(loop.chain_gain[1:] == 1.0))
    upstream = np.flatnonzero(loop.resonator[: n - 1] != 0.0)
    pairs = len(upstream)
    if not np.array_equal(upstream, np.arange(0, 2 * pairs, 2)):
        pairs = -1  # not the layout LoopRealization.for_ntf makes: keep every resonator term
    return _kernel_structure(loop), n, lossless, unit_chain, pairs


def _kernel_structure(loop: LoopRealization) -> str:
    """The kernels' name for the loop's structure (the feedforward feed-in has its own)."""
    return "feedforward-feed-in" if loop.input_feed_in else loop.structure


@dataclass(frozen=True, eq=False)
class ModulatorState:
    """Everything a :class:`Modulator` carries from one block to the next (a frozen value).

    Attributes
    ----------
    integrators : ndarray, shape (channels, order)
        Integrator states.
    rng_counter : ndarray of uint64, shape (channels,)
        Counter of each channel's dither generator.
    overload_count : ndarray of int64, shape (channels,)
        Overload samples so far: those on which the guard acted, and (multi-level quantizers)
        those on which the quantizer clipped, its input (dither included) more than half a
        step beyond the outermost level. This is the one definition of an overload that the
        stability search and the battery's overload onset share.
    state_peak : ndarray, shape (channels, order)
        Largest |state| seen so far (after the guard).
    samples : int
        Samples per channel processed so far.
    """

    integrators: np.ndarray
    rng_counter: np.ndarray
    overload_count: np.ndarray
    state_peak: np.ndarray
    samples: int = 0

    @property
    def channels(self) -> int:
        """Number of channels this state belongs to."""
        return self.integrators.shape[0]


class Modulator:
    """A delta-sigma modulator: loop, quantizer, optional TPDF dither and an overload guard.

    Parameters
    ----------
    ntf : NoiseTransfer or LoopRealization
        The noise transfer function to realize, or an already realized (e.g. scaled) loop.
    structure : str
        One of ``STRUCTURES`` (ignored when ``ntf`` is a ``LoopRealization``).
    input_feed_in : bool
        Feedforward only: feed the input straight to the quantizer too (see
        :meth:`LoopRealization.for_ntf`); ignored when ``ntf`` is a ``LoopRealization``.
    levels : int
        Quantizer output levels, 2 (single bit) to 2**24, evenly spaced in [-1, 1].
    dither_lsb : float
        TPDF dither added before the quantizer, peak amplitude in quantizer steps (LSB);
        1.0 is the classic 2-LSB peak-to-peak TPDF. 0 disables it.
    seed : int
        Seed of the dither generators (channel ``c`` derives its own stream from it).
    guard : str
        What to do on overload: ``"reset"`` zeroes all states, ``"clamp"`` clips each state.
    state_bound : float
        Overload when any |state| exceeds this (default 1e6: unscaled feedforward loops keep
        large states in their last integrators; a few times the bound suits scaled loops).
    input_bound : float
        Overload when |quantizer input| exceeds this (default 8 full-scale units: a loop whose
        quantizer input is that far outside [-1, 1] has lost control).

    Notes
    -----
    ``run`` returns the quantizer output in full-scale units. The guard checks every sample;
    ``ModulatorState.overload_count`` counts the samples it acted on, and the samples on which
    a multi-level quantizer clipped (its input more than half a step past +-1, so the
    quantization error exceeds half a step: the overload of the no-overload rule in [1]_). A
    two-level quantizer never clips.

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
       IEEE Press / Wiley, 2005, ch. 4 (multi-bit no-overload condition; from memory).
    """

    def __init__(
        self,
        ntf,
        structure: str = "feedback",
        levels: int = 2,
        dither_lsb: float = 0.0,
        seed: int = 0,
        guard: str = "reset",
        state_bound: float = 1.0e6,
        input_bound: float = 8.0,
        input_feed_in: bool = False,
    ):
        if isinstance(ntf, LoopRealization):
            loop = ntf
        elif isinstance(ntf, NoiseTransfer):
            if structure not in STRUCTURES:
                raise ParameterError("structure", structure, f"one of {', '.join(STRUCTURES)}")
            loop = LoopRealization.for_ntf(ntf, structure=structure, input_feed_in=input_feed_in)
        else:
            raise ParameterError("ntf", type(ntf).__name__, "a NoiseTransfer or LoopRealization")
        lowest, highest = LEVELS_RANGE
        if isinstance(levels, bool) or not isinstance(levels, int | np.integer):
            raise ParameterError("levels", levels, f"an integer from {lowest} to {highest}")
        if not lowest <= levels <= highest:
            raise ParameterError("levels", levels, f"an integer from {lowest} to {highest}")
        if not (np.isfinite(dither_lsb) and dither_lsb >= 0):
            raise ParameterError("dither_lsb", dither_lsb, "a finite number >= 0")
        if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
            raise ParameterError("seed", seed, "an integer >= 0")
        if guard not in GUARD_ACTIONS:
            raise ParameterError("guard", guard, f"one of {', '.join(GUARD_ACTIONS)}")
        for name, value in (("state_bound", state_bound), ("input_bound", input_bound)):
            if not (np.isfinite(value) and value > 0):
                raise ParameterError(name, value, "a finite number > 0")
        # A single-bit feedback loop may have its quantizer-facing state scaled too
        # (LoopRealization.rescaled(include_quantizer_state=True)): the kernels read that state
        # as the quantizer input, so the quantizer sees y / g (g = c[-1]); a sign decision does
        # not mind, and the dither and the input bound are divided by g to match.
        self._quantizer_gain = 1.0
        if loop.input_feed_in and loop.direct_input != 1.0:
            raise ParameterError(
                "ntf.direct_input", loop.direct_input, "1.0 for a feedforward loop's input feed-in"
            )
        if loop.structure == "feedback" and loop.output_weight[-1] != 1.0:
            if levels != 2:
                raise ParameterError(
                    "levels",
                    levels,
                    "2 for a feedback loop whose quantizer-facing state is scaled",
                )
            self._quantizer_gain = float(loop.output_weight[-1])
        self.loop = loop
        self.levels = int(levels)
        self.dither_lsb = float(dither_lsb)
        self.seed = int(seed)
        self.guard = guard
        self.state_bound = float(state_bound)
        self.input_bound = float(input_bound)
        self._coef = np.ascontiguousarray(
            np.vstack(
                [
                    loop.leak,
                    loop.chain_gain,
                    loop.resonator,
                    loop.feedback,
                    loop.input_gain,
                    loop.output_weight,
                ]
            ),
            dtype=np.float64,
        )

        key = _kernel_key(loop)
        self._fast_kernel = None if key is None else _kernels.loop_kernel(*key)
        # An unscaled loop's kernel leaves out the chain gains (all exactly 1); the kernel
        # that multiplies by them computes the same numbers (x * 1.0 == x), so short runs
        # (the stability search's, before the chain runs the scaled loop with that kernel)
        # take it unless this loop's own is already loaded: one compile instead of two.
        self._general_kernel = None
        if key is not None and key[3]:
            self._general_kernel = _kernels.loop_kernel(key[0], key[1], key[2], False, key[4])

    @property
    def structure(self) -> str:
        """The loop structure."""
        return self.loop.structure

    @property
    def order(self) -> int:
        """The loop order."""
        return self.loop.order

    @property
    def step(self) -> float:
        """Quantizer step (one LSB) in full-scale units, ``2 / (levels - 1)``."""
        return 2.0 / (self.levels - 1)

    def __repr__(self) -> str:
        return (
            f"Modulator(order={self.order}, structure={self.structure!r}, levels={self.levels}, "
            f"dither_lsb={self.dither_lsb}, guard={self.guard!r})"
        )

    def initial_state(self, channels: int = 1) -> ModulatorState:
        """The state before the first sample: zero integrators, seeded dither counters."""
        counters = np.array(
            [_splitmix(self.seed * 0x100000001 + c + 1) for c in range(channels)], dtype=np.uint64
        )
        return ModulatorState(
            integrators=_readonly(np.zeros((channels, self.order))),
            rng_counter=_readonly(counters),
            overload_count=_readonly(np.zeros(channels, dtype=np.int64)),
            state_peak=_readonly(np.zeros((channels, self.order))),
            samples=0,
        )

    def _check(self, x, state):
        x = np.asarray(x)
        if x.ndim not in (1, 2):
            raise ParameterError("x.shape", x.shape, "(frames,) or (frames, channels)")
        if not np.issubdtype(x.dtype, np.number) or np.iscomplexobj(x):
            raise ParameterError("x.dtype", str(x.dtype), "real numbers")
        # indexing rather than reshape(len(x), -1), which has no answer for 0 frames
        x2 = (x[:, None] if x.ndim == 1 else x).astype(np.float64, copy=False)
        if x2.shape[1] == 0:
            raise ParameterError("x.shape", x.shape, "at least one channel")
        channels = x2.shape[1]
        if state is None:
            state = self.initial_state(channels)
        elif not isinstance(state, ModulatorState):
            raise ParameterError("state", type(state).__name__, "a ModulatorState or None")
        elif state.integrators.shape != (channels, self.order):
            raise ParameterError(
                "state",
                f"shape {state.integrators.shape}",
                f"a state for {channels} channel(s) of a loop of order {self.order}",
            )
        return x, x2, state

    def _kernel_scalars(self) -> tuple:
        """The scalar arguments every loop kernel takes after its arrays, in order."""
        g = self._quantizer_gain
        return (
            self.levels,
            self.dither_lsb * self.step / g,
            self.input_bound / g,
            self.state_bound,
            self.guard == "reset",
        )

    def _run_channel(self, u, out, state_row, counter, peak_row, count, trace):
        """One channel through one kernel call; returns (state, counter, peaks, count, bad).

        ``u`` and ``out`` are contiguous float64 of the same length. The kernels run any
        length in one call (they block the samples themselves) and report the first
        non-finite input sample (``bad``, -1 when there is none).
        """
        st = np.array(state_row, dtype=np.float64)
        rng = np.array([counter], dtype=np.uint64)
        peaks = np.array(peak_row, dtype=np.float64)
        counts = np.array([count], dtype=np.int64)
        scalars = self._kernel_scalars()
        if trace is None and self._fast_kernel is not None:
            kernel = self._fast_kernel
            if len(u) < _SHORT_RUN and self._general_kernel is not None:
                variant = (self.levels == 2, scalars[1] != 0.0)
                if not kernel.has_variant(*variant):
                    kernel = self._general_kernel
            bad = kernel(u, out, self._coef, st, rng, peaks, counts, *scalars)
        else:
            bad = _kernels.loop_any_structure(
                u,
                out,
                self._coef,
                st,
                rng,
                peaks,
                counts,
                _kernels.STRUCTURE_CODES[_kernel_structure(self.loop)],
                *scalars,
                np.empty((0, self.order)) if trace is None else trace,
            )
        return st, rng[0], peaks, counts[0], int(bad)

    def _check_out(self, out, shape):
        if not isinstance(out, np.ndarray):
            raise ParameterError("out", type(out).__name__, "a float64 array or None")
        if out.shape != shape or out.dtype != np.float64 or not out.flags.writeable:
            raise ParameterError(
                "out",
                f"{out.dtype} array of shape {out.shape}",
                f"a writeable float64 array of shape {shape}",
            )
        return out

    def _process(self, x, state, want_trace, out=None):
        x, x2, state = self._check(x, state)
        n, channels = x2.shape
        if out is not None:
            out = self._check_out(out, x.shape)
        traces = [np.empty((n, self.order)) if want_trace else None for _ in range(channels)]
        if x.ndim == 1:
            # one channel: straight into the caller's buffer (or a fresh one), no copies
            u = np.ascontiguousarray(x2[:, 0])
            y = out if out is not None and out.flags.c_contiguous else np.empty(n)
            outs = [y]
        else:
            y = out if out is not None else np.empty((n, channels))
            outs = [np.empty(n) for _ in range(channels)]

        def one(c):
            u_c = u if x.ndim == 1 else np.ascontiguousarray(x2[:, c])
            return self._run_channel(
                u_c,
                outs[c],
                state.integrators[c],
                state.rng_counter[c],
                state.state_peak[c],
                state.overload_count[c],
                traces[c],
            )

        if channels > 1 and n > 0:
            results = list(_thread_pool().map(one, range(channels)))
        else:
            results = [one(c) for c in range(channels)]
        for r in results:
            if r[4] >= 0:
                raise ParameterError("x", f"non-finite sample at frame {r[4]}", "finite samples")
        if x.ndim == 1:
            if y is not out and out is not None:
                out[...] = y
                y = out
        else:
            for c in range(channels):
                y[:, c] = outs[c]
        new_state = ModulatorState(
            integrators=_readonly(np.array([r[0] for r in results])),
            rng_counter=_readonly(np.array([r[1] for r in results], dtype=np.uint64)),
            state_peak=_readonly(np.array([r[2] for r in results])),
            overload_count=_readonly(np.array([r[3] for r in results], dtype=np.int64)),
            samples=state.samples + n,
        )
        return y, new_state, traces

    def run(
        self, x, state: ModulatorState | None = None, *, out: np.ndarray | None = None
    ) -> tuple[np.ndarray, ModulatorState]:
        """Modulate ``x`` (full-scale units at the modulator rate).

        Parameters
        ----------
        x : array_like, shape (frames,) or (frames, channels)
            Input samples, finite. Channels are independent and run in parallel threads.
            Zero frames are allowed: the output is empty and the state comes back unchanged.
        state : ModulatorState or None
            The state returned by the previous call, or None to start from rest.
        out : ndarray or None, keyword-only
            A writeable float64 array of the shape of ``x`` to write the output into (and
            return), instead of a new one: a caller running many blocks saves the allocation
            and the first touch of fresh memory. On a ParameterError for a non-finite input
            sample its contents are undefined.

        Returns
        -------
        y : ndarray, same shape as ``x``
            Quantizer output, values in ``-1 + step * k``, ``k = 0 .. levels-1`` (``out``
            itself when given).
        state : ModulatorState
            The state after the last sample. Running ``x`` in blocks and passing the state on
            gives the same ``y``, bit for bit, as one call.

        Raises
        ------
        ParameterError
            For a non-finite input sample (the message names the first one's frame), a
            state of the wrong shape, or an ``out`` of the wrong shape or type.
        """
        y, new_state, _ = self._process(x, state, False, out)
        return y, new_state

    def process(self, x, state: ModulatorState | None = None):
        """Same as :meth:`run` (the stage interface ``process(x, state) -> (y, state)``)."""
        return self.run(x, state)

    def trace_states(self, x, state: ModulatorState | None = None):
        """Run like :meth:`run` and also return the integrator states after every sample.

        Returns
        -------
        y : ndarray
            As from :meth:`run`.
        states : ndarray, shape (frames, order) or (frames, channels, order)
            Integrator states after each sample (after the guard).
        """
        y, _, traces = self._process(x, state, True)
        states = traces[0] if np.ndim(x) == 1 else np.stack(traces, axis=1)
        return y, states

    def trace_quantizer_input(self, x, state: ModulatorState | None = None):
        """Run like :meth:`run` and also return the quantizer's input on every sample.

        The input is the linearized loop's (:meth:`LoopRealization.linearized`): the
        quantizer-input weights on the states before the sample plus the direct input path,
        without dither, in the units in which the loop realizes its NTF at unit quantizer gain
        (a scaled quantizer-facing state is scaled back). An undithered quantizer's output is
        the quantized input, so a sign quantizer's output has the sign of it.

        Returns
        -------
        y : ndarray
            As from :meth:`run`.
        quantizer_input : ndarray, same shape as ``y``
        """
        if state is None:
            state = self.initial_state(1 if np.ndim(x) == 1 else np.shape(x)[1])
        y, states = self.trace_states(x, state)
        start = state.integrators[0] if np.ndim(x) == 1 else state.integrators
        before = np.concatenate([np.asarray(start)[None], states[:-1]], axis=0)
        lin = self.loop.linearized()
        u = np.asarray(x, dtype=float)
        return y, before @ lin.quantizer_tap + lin.input_direct * u

    def probe_stability(
        self,
        *,
        osr: float,
        run_samples: int = STABILITY_RUN_SAMPLES,
        noise_rise_db: float = 6.0,
        reference_level_dbfs: float = -40.0,
        amplitude_step: float = 0.002,
        band_fractions: tuple[float, ...] = STABILITY_BAND_FRACTIONS,
    ) -> StabilityProbe:
        """Search the largest input sine amplitude the loop handles at every test frequency.

        An amplitude ``A`` is stable when, at each test frequency, a run of ``run_samples``
        samples (after ``run_samples/8`` settling samples at the same amplitude) has no
        overload (``ModulatorState.overload_count`` stays 0: the guard never acted and a
        multi-level quantizer never clipped) and its in-band SQNR is no more than
        ``noise_rise_db`` below ``SQNR_ref + 20 log10(A / A_ref)`` (the in-band noise has not
        risen by more than that over the reference runs at ``reference_level_dbfs``;
        ``SQNR_ref`` is the lowest of their SQNRs, i.e. the largest in-band noise: at low levels
        a loop's noise can be patterned and differ from one test frequency to another).

        The search does not assume stability is monotonic in amplitude (high-order single-bit
        instability is statistical and frequency dependent [1]_):

        1. A slow ramp per test frequency: a sine whose level rises evenly in dB from
           ``reference_level_dbfs`` to 0 dBFS over ``run_samples`` samples (about 0.08 dB per
           2**11 samples at the default length). The level at the start of the first piece
           of 2**11 samples (``run_samples/512`` for other lengths) with an overload is that
           frequency's first failure; the lowest over the frequencies is the first candidate.
        2. Fixed-amplitude runs at the candidate, all frequencies, each run with its own
           dither stream. If any fails, the candidate drops by ``amplitude_step`` times 1, 2,
           4, ... until all pass; then the gap up to the last failure is walked upward in
           steps of at most ``amplitude_step`` (16 at most) and the last amplitude before the
           first failure is the result. The lowest failure found anywhere bounds the result.

        The test frequencies lie on exact FFT bins at ``band_fractions`` of the band edge
        ``0.5/osr`` (by default a tenth, about half, and nine tenths: near the band edge).
        The dither seed differs from run to run (derived from the modulator's seed, so the
        search is repeatable). Results are remembered by loop (coefficients, quantizer,
        dither, seed, guard) and search settings, in this process and on disk
        (:mod:`audiodsm.stages.loop_cache`).

        Parameters
        ----------
        osr : float, keyword-only
            Oversampling ratio; the band is 0..0.5/osr cycles per sample.
        run_samples : int, keyword-only
            Samples analysed per run (a power of two is fastest); default 2**20.
        noise_rise_db : float, keyword-only
            Allowed rise of in-band noise over the reference.
        reference_level_dbfs : float, keyword-only
            Level of the reference runs and the start of the ramps.
        amplitude_step : float, keyword-only
            Resolution of the fixed-amplitude search (fraction of full scale).
        band_fractions : tuple of float, keyword-only
            Test frequencies as fractions of the band edge, each in (0, 1).

        Returns
        -------
        StabilityProbe
            The amplitude; the largest state peaks over the test frequencies there; the SQNRs
            at the frequency that limited the search.

        References
        ----------
        .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
           IEEE Press / Wiley, 2005, ch. 4 (maximum stable amplitude found by simulation, with
           long runs or a slowly rising input; chapter number from memory). The criterion and
           its thresholds here are this project's own choice.
        """
        if not (np.isfinite(osr) and osr >= 4):
            raise ParameterError("osr", osr, "a number >= 4")
        if not (isinstance(run_samples, int | np.integer) and run_samples >= 1024):
            raise ParameterError("run_samples", run_samples, "an integer >= 1024")
        edge_bin = run_samples * 0.5 / osr
        if edge_bin < 20:
            raise ParameterError(
                "run_samples", run_samples, f"at least {int(np.ceil(40 * osr))} for osr={osr}"
            )
        fractions = tuple(float(f) for f in band_fractions)
        if not fractions or not all(0.0 < f < 1.0 for f in fractions):
            raise ParameterError("band_fractions", band_fractions, "fractions in (0, 1)")
        if not (np.isfinite(amplitude_step) and 0 < amplitude_step < 0.5):
            raise ParameterError("amplitude_step", amplitude_step, "a number in (0, 0.5)")
        settings = (
            float(osr),
            int(run_samples),
            float(noise_rise_db),
            float(reference_level_dbfs),
            float(amplitude_step),
            fractions,
        )
        key = (self._identity(), settings)
        hit = _PROBES.get(key)
        if hit is None:
            from audiodsm.stages import loop_cache

            hit = loop_cache.load("stability-probe", key)
            if not isinstance(hit, StabilityProbe):
                hit = _StabilitySearch(self, *settings).result()
                loop_cache.store("stability-probe", key, hit)
            if len(_PROBES) >= _PROBES_MAX:
                _PROBES.pop(next(iter(_PROBES)))
            _PROBES[key] = hit
        return hit

    def _identity(self) -> tuple:
        """What decides this loop's behaviour, as a key with the same repr in every process."""
        digest = hashlib.sha256(np.ascontiguousarray(self._coef).tobytes()).hexdigest()
        return (
            digest,
            self.structure,
            self.levels,
            self.dither_lsb,
            self.seed,
            self.guard,
            self.state_bound,
            self.input_bound,
            self._quantizer_gain,
        )

    def _reseeded(self, seed: int) -> Modulator:
        """The same loop and settings with another dither seed."""
        return Modulator(
            self.loop,
            levels=self.levels,
            dither_lsb=self.dither_lsb,
            seed=seed,
            guard=self.guard,
            state_bound=self.state_bound,
            input_bound=self.input_bound,
        )

    def with_scaled_states(
        self,
        *,
        osr: float,
        peak_target: float = 1.0,
        powers_of_two: bool = False,
        **probe_options,
    ) -> tuple[Modulator, StabilityProbe]:
        """A copy of the modulator with its integrators rescaled to peak at ``peak_target``.

        The stable amplitude is found on this loop (:meth:`probe_stability`); its state peaks
        there give the diagonal similarity transform (:meth:`LoopRealization.rescaled`), which
        leaves the NTF unchanged. The scaled loop is then run again at the same amplitude and
        its peaks reported.

        With ``powers_of_two`` every factor is a power of two: the scaled loop's output is then
        bit-identical to the unscaled loop's, and each scaled state peaks in
        ``(peak_target/2, peak_target]``.

        Parameters
        ----------
        osr : float, keyword-only
            Oversampling ratio for the stability search.
        peak_target : float, keyword-only
            Target peak of each state.
        powers_of_two : bool, keyword-only
            Round the factors up to powers of two (see :meth:`LoopRealization.rescaled`).
        **probe_options
            Passed on to :meth:`probe_stability`.

        Returns
        -------
        scaled : Modulator
            Same settings, scaled loop.
        probe : StabilityProbe
            For the scaled loop at the amplitude found: ``state_peaks`` are the simulated peaks
            after scaling (close to ``peak_target``). The quantizer-facing state keeps its own
            size in error-feedback loops and in multi-level feedback loops, where the quantizer
            fixes it; a single-bit feedback loop has it scaled too (its sign decision does not
            mind).

        References
        ----------
        .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
           IEEE Press / Wiley, 2005, ch. 4 (dynamic-range scaling of the loop states; chapter
           number from memory).
        """
        probe = self.probe_stability(osr=osr, **probe_options)
        if probe.stable_amplitude <= 0:
            raise ParameterError("modulator", repr(self), "a loop stable for some input")
        peaks = np.where(probe.state_peaks > 0, probe.state_peaks, 1.0)
        single_bit_feedback = self.structure == "feedback" and self.levels == 2
        loop = self.loop.rescaled(
            peaks,
            peak_target=peak_target,
            powers_of_two=powers_of_two,
            include_quantizer_state=single_bit_feedback,
        )
        scaled = Modulator(
            loop,
            levels=self.levels,
            dither_lsb=self.dither_lsb,
            seed=self.seed,
            guard=self.guard,
            state_bound=self.state_bound,
            input_bound=self.input_bound,
        )
        # the scaled loop at the same amplitude, every test frequency, the search's settings
        search = _StabilitySearch.for_options(scaled, osr, probe_options)
        runs = search.runs_at(probe.stable_amplitude)
        after = StabilityProbe(
            stable_amplitude=probe.stable_amplitude,
            state_peaks=np.max([r.peaks for r in runs], axis=0),
            sqnr_db=min(r.sqnr_db for r in runs),
            reference_sqnr_db=probe.reference_sqnr_db,
            test_frequency=probe.test_frequency,
            test_frequencies=probe.test_frequencies,
        )
        return scaled, after


@dataclass(frozen=True)
class StabilityProbe:
    """Result of :meth:`Modulator.probe_stability`.

    Attributes
    ----------
    stable_amplitude : float
        Largest sine amplitude (fraction of full scale) judged stable; 0 when none is.
    state_peaks : ndarray, shape (order,)
        Peak |state| of each integrator, the largest over the runs at that amplitude.
    sqnr_db : float
        In-band SQNR at that amplitude at ``test_frequency``.
    reference_sqnr_db : float
        In-band SQNR at the small reference amplitude at ``test_frequency``.
    test_frequency : float
        The test frequency that limited the search (the least SQNR margin at the result),
        in cycles per modulator sample.
    test_frequencies : tuple of float
        All test frequencies of the search, cycles per modulator sample.
    """

    stable_amplitude: float
    state_peaks: np.ndarray
    sqnr_db: float
    reference_sqnr_db: float
    test_frequency: float
    test_frequencies: tuple = ()


@functools.lru_cache(maxsize=4)
def _analysis_window(n: int) -> np.ndarray:
    """The 4-term Blackman-Harris window of ``n`` samples (periodic), made once per length."""
    from scipy.signal import windows  # the stability probe's only use: imported when it runs

    w = windows.blackmanharris(n, sym=False)
    w.setflags(write=False)
    return w


def _in_band_sqnr_db(y: np.ndarray, bin_index: int, osr: float) -> float:
    """SQNR of output ``y`` in the band 0..0.5/osr: tone bins vs the rest of the band.

    The spectrum is taken with a 4-term Blackman-Harris window; the tone occupies bins
    ``bin_index +- 4``; DC bins 0..3 are excluded from the noise.
    """
    import scipy.fft

    n = len(y)
    spec = np.abs(scipy.fft.rfft(y * _analysis_window(n))) ** 2
    edge = int(np.floor(n * 0.5 / osr))
    tone = slice(bin_index - 4, bin_index + 5)
    signal = spec[tone].sum()
    band = spec[4 : edge + 1].sum()
    noise = max(band - spec[max(tone.start, 4) : tone.stop].sum(), 1e-300)
    with np.errstate(over="ignore"):  # a noise-free band (1e-300) reads +inf dB, silently
        return float(10 * np.log10(signal / noise))


class _Run(NamedTuple):
    """One fixed-amplitude run of the stability search at one frequency."""

    ok: bool
    sqnr_db: float
    margin_db: float
    overloads: int
    peaks: np.ndarray


class _StabilitySearch:
    """The search behind :meth:`Modulator.probe_stability` (see there for the method)."""

    def __init__(self, modulator, osr, run_samples, noise_rise_db, reference_dbfs, step, fractions):
        self.modulator = modulator
        self.osr = float(osr)
        self.n = int(run_samples)
        self.settle = self.n // 8
        self.rise = float(noise_rise_db)
        self.reference_dbfs = float(reference_dbfs)
        self.ref_amp = 10.0 ** (reference_dbfs / 20.0)
        self.step = float(step)
        edge = int(np.floor(self.n * 0.5 / self.osr))
        bins = set()
        for f in fractions:
            b = max(int(round(f * self.n * 0.5 / self.osr)) | 1, 9)
            b = min(b, edge - 5)  # the tone's bins (+-4) stay inside the band
            bins.add(b if b % 2 else b - 1)
        self.bins = sorted(bins)
        self.ref_sqnr = None
        self._attempt = 0

    @classmethod
    def for_options(cls, modulator, osr, options):
        """A search with :meth:`Modulator.probe_stability`'s defaults for options not given."""
        defaults = {
            "run_samples": STABILITY_RUN_SAMPLES,
            "noise_rise_db": 6.0,
            "reference_level_dbfs": -40.0,
            "amplitude_step": 0.002,
            "band_fractions": STABILITY_BAND_FRACTIONS,
        }
        unknown = set(options) - set(defaults)
        if unknown:
            raise ParameterError("probe option", sorted(unknown)[0], ", ".join(defaults))
        o = {**defaults, **options}
        return cls(
            modulator,
            osr,
            o["run_samples"],
            o["noise_rise_db"],
            o["reference_level_dbfs"],
            o["amplitude_step"],
            tuple(o["band_fractions"]),
        )

    def _next_modulator(self):
        """The loop with the next dither seed of this search (each run its own stream)."""
        self._attempt += 1
        seed = _splitmix(self.modulator.seed * 0x100000001 + 0x5EED * self._attempt) >> 2
        return self.modulator._reseeded(int(seed))

    def runs_at(self, amplitude):
        """Fixed-amplitude runs at every test frequency (one channel each, in parallel)."""
        total = self.n + self.settle
        t = np.arange(total)
        mods = [self._next_modulator() for _ in self.bins]

        def one(c):
            x = amplitude * np.sin(2 * np.pi * self.bins[c] * t / self.n)
            y, st = mods[c].run(x)
            sqnr = _in_band_sqnr_db(y[self.settle :], self.bins[c], self.osr)
            return sqnr, int(st.overload_count[0]), np.array(st.state_peak[0])

        results = list(_thread_pool().map(one, range(len(self.bins))))
        out = []
        for c, (value, overloads, peaks) in enumerate(results):
            if self.ref_sqnr is None:
                margin = 0.0
            else:
                expected = self.ref_sqnr[c] + 20 * np.log10(amplitude / self.ref_amp)
                margin = value - (expected - self.rise)
            out.append(_Run(overloads == 0 and margin >= 0.0, value, margin, overloads, peaks))
        return out

    def ramp_limits(self):
        """Per frequency, the level at which a slowly rising sine first overloads (or 1.0)."""
        n = self.n
        piece = max(n // 512, 256)
        rise_db = -self.reference_dbfs
        limits = [None] * len(self.bins)
        state = None
        mod = self._next_modulator()
        w = 2 * np.pi * np.asarray(self.bins, dtype=float) / n
        for start in range(0, n, piece):
            t = np.arange(start, min(n, start + piece))
            envelope = self.ref_amp * 10.0 ** (rise_db * t / n / 20.0)
            _, state = mod.run(envelope[:, None] * np.sin(w[None, :] * t[:, None]), state)
            for c in range(len(self.bins)):
                if limits[c] is None and state.overload_count[c] > 0:
                    limits[c] = float(envelope[0])
            if all(v is not None for v in limits):
                break
        return [1.0 if v is None else min(v, 1.0) for v in limits]

    def result(self) -> StabilityProbe:
        freqs = tuple(b / self.n for b in self.bins)
        ref = self.runs_at(self.ref_amp)
        # one reference for all frequencies: the largest in-band noise of the reference runs
        # (at low levels a loop's noise can be patterned and differ from one tone to another;
        # a quiet pattern at one frequency must not make every louder level look like a rise)
        self.ref_sqnr = [min(r.sqnr_db for r in ref)] * len(ref)
        if any(r.overloads for r in ref):
            worst = int(np.argmin([r.sqnr_db for r in ref]))
            return StabilityProbe(
                0.0,
                np.zeros(self.modulator.order),
                ref[worst].sqnr_db,
                ref[worst].sqnr_db,
                freqs[worst],
                freqs,
            )
        candidate = min(self.ramp_limits())
        runs = self.runs_at(candidate)
        best, best_runs = None, None
        if all(r.ok for r in runs):
            best, best_runs = candidate, runs
        else:
            failed = candidate
            k = 0
            while best is None:
                a = max(candidate - self.step * 2**k, self.ref_amp)
                runs = self.runs_at(a)
                if all(r.ok for r in runs):
                    best, best_runs = a, runs
                elif a <= self.ref_amp:
                    worst = int(np.argmin([r.margin_db for r in runs]))
                    return StabilityProbe(
                        0.0,
                        np.zeros(self.modulator.order),
                        runs[worst].sqnr_db,
                        self.ref_sqnr[worst],
                        freqs[worst],
                        freqs,
                    )
                else:
                    failed = a
                    k += 1
            # walk up from the passing amplitude towards the lowest failure found
            base, gap = best, failed - best
            count = min(16, int(np.ceil(gap / self.step - 1e-9)))
            for i in range(1, count):
                a = base + gap * i / count
                runs = self.runs_at(a)
                if not all(r.ok for r in runs):
                    break
                best, best_runs = a, runs
        worst = int(np.argmin([r.margin_db for r in best_runs]))
        return StabilityProbe(
            stable_amplitude=float(best),
            state_peaks=np.max([r.peaks for r in best_runs], axis=0),
            sqnr_db=float(best_runs[worst].sqnr_db),
            reference_sqnr_db=float(self.ref_sqnr[worst]),
            test_frequency=freqs[worst],
            test_frequencies=freqs,
        )
