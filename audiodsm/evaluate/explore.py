"""Explore a design space: enumerate loops, prune with the linear model, grade, keep the front.

A *space file* (TOML) names a base profile and lists or ranges of settings::

    name = "demo DAC space"
    base = "../dac_chip/pdm5_64x.toml"     # relative to the space file
    candidate_limit = 200                   # refuse spaces larger than this
    prune_slack_db = 3.0                    # keep loops predicted within 3 dB of the DR target

    [vary]
    order = [3, 4, 5]
    osr = [64, 128]
    levels = [2, 3, 5, 9, 17]
    out_of_band_gain = { from = 1.3, to = 1.7, step = 0.2 }
    structure = ["feedback", "feedforward"]
    output_kind = ["pdm", "nrz"]
    filter_order = [2, 3]
    element_selection = ["thermometer", "data-weighted"]   # multi-level NRZ only

    [fixed]
    "reconstruction.cutoff_hz" = 60000.0    # any profile key, "section.key"

Every combination the profile schema accepts is a candidate (PDM with more than two levels is
not one). Candidates whose linear-model dynamic range, dither included, falls more than
``prune_slack_db`` below the spec sheet's dynamic-range target are dropped without running;
the others run the battery (through :func:`~audiodsm.evaluate.grade.grade_batch`: on the
cluster, from and into the cache). The *cost* of a loop is a hardware proxy:

    cost = modulator clock (MHz) x quantizer levels x loop order  [+ PWM switching rate (MHz)]

the first term as in :func:`~audiodsm.evaluate.search.loop_cost` (logic speed x comparators x
integrators), the second the PWM bridge's edge rate, which sets its switching losses. The
*front* is the set of graded candidates no other candidate beats on both cost (lower) and worst
normalized spec margin (higher, :attr:`~audiodsm.evaluate.grade.ProfileGrade.ranking_margin`).

References
----------
.. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", IEEE/Wiley
   2005, ch. 4 (linear model of the noise-shaped quantizer).
.. [2] S. P. Lipshitz, R. A. Wannamaker and J. Vanderkooy, "Quantization and dither: a
   theoretical survey", J. Audio Eng. Soc. 40(5), 1992 (TPDF dither of peak amplitude d LSB
   has variance d^2/6 LSB^2).
.. [3] V. Pareto's optimality; e.g. K. Deb, "Multi-Objective Optimization using Evolutionary
   Algorithms", Wiley 2001, ch. 2 (non-dominated set).
"""

from __future__ import annotations

import html
import itertools
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path

from audiodsm.errors import ParameterError, ProfileError

__all__ = [
    "DesignSpace",
    "ExploredCandidate",
    "Exploration",
    "load_space",
    "enumerate_candidates",
    "predicted_range_with_dither_db",
    "cost_proxy",
    "pareto_front",
    "explore_space",
    "write_exploration",
]

#: Keys of ``[vary]`` and where they go in a profile.
VARY_KEYS = {
    "order": ("modulator", "order"),
    "osr": ("upsampler", "osr"),
    "levels": ("modulator", "levels"),
    "out_of_band_gain": ("modulator", "out_of_band_gain"),
    "structure": ("modulator", "structure"),
    "output_kind": ("output", "kind"),
    "filter_order": ("reconstruction", "filter_order"),
    "element_selection": ("impairments", "element_selection"),
}
_TOP_KEYS = {"name", "base", "candidate_limit", "prune_slack_db", "vary", "fixed"}
#: Largest candidate limit a space file may state.
MAX_CANDIDATE_LIMIT = 100_000
_DR_METRICS = {
    "dynamic_range_db": "unweighted",
    "dynamic_range_db_a": "a",
    "dynamic_range_db_ccir": "ccir",
}


@dataclass(frozen=True)
class DesignSpace:
    """A parsed space file.

    Attributes
    ----------
    name : str
    source : str
    base : ChainProfile
    candidate_limit : int
    prune_slack_db : float
    vary : dict
        ``[vary]`` key -> tuple of values.
    fixed : dict
        ``"section.key"`` -> value.
    """

    name: str
    source: str
    base: object
    candidate_limit: int
    prune_slack_db: float
    vary: dict
    fixed: dict


def _values(path, key, raw) -> tuple:
    if isinstance(raw, dict):
        unknown = set(raw) - {"from", "to", "step"}
        if unknown or not {"from", "to", "step"} <= set(raw):
            raise ProfileError(path, f"vary.{key}", "expected a list or {from, to, step}")
        lo, hi, step = raw["from"], raw["to"], raw["step"]
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in raw.values()):
            raise ProfileError(path, f"vary.{key}", "from, to and step must be numbers")
        if step <= 0 or hi < lo:
            raise ProfileError(path, f"vary.{key}", f"empty range from {lo} to {hi} step {step}")
        count = int(math.floor((hi - lo) / step + 1e-9)) + 1
        values = [lo + k * step for k in range(count)]
        if all(isinstance(v, int) for v in (lo, hi, step)):
            return tuple(int(v) for v in values)
        return tuple(round(v, 12) for v in values)
    if not isinstance(raw, list):
        raise ProfileError(path, f"vary.{key}", "expected a list or {from, to, step}")
    if not raw:
        raise ProfileError(path, f"vary.{key}", "empty list")
    return tuple(raw)


def load_space(path) -> DesignSpace:
    """Read and check a space file (see the module description).

    Raises
    ------
    ProfileError
        An unreadable file, unknown keys, an empty list or range, a missing base profile.
    """
    from audiodsm.profile import load_profile

    path = Path(path)
    try:
        table = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ProfileError(str(path), "", exc.strerror or str(exc)) from None
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(str(path), "", f"not valid TOML ({exc})") from None
    unknown = sorted(set(table) - _TOP_KEYS)
    if unknown:
        raise ProfileError(str(path), unknown[0], f"unknown key; expected {sorted(_TOP_KEYS)}")
    vary_raw = table.get("vary", {})
    if not isinstance(vary_raw, dict) or not vary_raw:
        raise ProfileError(str(path), "vary", "expected a table with at least one setting")
    unknown = sorted(set(vary_raw) - set(VARY_KEYS))
    if unknown:
        raise ProfileError(str(path), f"vary.{unknown[0]}", f"unknown; expected {list(VARY_KEYS)}")
    vary = {k: _values(str(path), k, v) for k, v in vary_raw.items()}
    fixed = table.get("fixed", {})
    if not isinstance(fixed, dict):
        raise ProfileError(str(path), "fixed", 'expected a table of "section.key" = value')
    for key in fixed:
        if key.count(".") != 1:
            raise ProfileError(str(path), f"fixed.{key}", 'expected "section.key"')
    limit = table.get("candidate_limit", 500)
    if (
        isinstance(limit, bool)
        or not isinstance(limit, int)
        or not 1 <= limit <= MAX_CANDIDATE_LIMIT
    ):
        raise ProfileError(str(path), "candidate_limit", f"expected 1..{MAX_CANDIDATE_LIMIT}")
    slack = table.get("prune_slack_db", 3.0)
    if isinstance(slack, bool) or not isinstance(slack, (int, float)) or not 0 <= slack <= 60:
        raise ProfileError(str(path), "prune_slack_db", "expected a number from 0 to 60")
    base_name = table.get("base")
    if base_name is None:
        from audiodsm.profile import parse_profile

        base = parse_profile('name = "base"\n', source=str(path))
    else:
        base = load_profile(path.parent / str(base_name))
    return DesignSpace(
        name=str(table.get("name", path.stem)),
        source=str(path),
        base=base,
        candidate_limit=limit,
        prune_slack_db=float(slack),
        vary=vary,
        fixed=dict(fixed),
    )


def _label(settings: dict) -> str:
    short = {
        "out_of_band_gain": "g",
        "output_kind": "",
        "filter_order": "f",
        "element_selection": "",
    }
    parts = []
    for key, value in settings.items():
        if key == "order":
            parts.append(f"o{value}")
        elif key == "osr":
            parts.append(f"{value}x")
        elif key == "levels":
            parts.append(f"{value}lev")
        elif key == "structure":
            parts.append({"feedback": "fb", "feedforward": "ff"}.get(value, "ef"))
        else:
            parts.append(f"{short.get(key, key)}{value:g}" if isinstance(value, float)
                         else f"{short.get(key, key)}{value}")  # fmt: skip
    return "-".join(parts)


def enumerate_candidates(space: DesignSpace) -> list:
    """Every combination the profile schema accepts, as ``(settings, ChainProfile)``.

    Raises
    ------
    ParameterError
        More candidates than the space's ``candidate_limit`` (before any work starts), or a
        ``[fixed]`` key the profile schema refuses.
    """
    from audiodsm.profile import profile_from_dict
    from audiodsm.profile_text import profile_to_dict

    base = profile_to_dict(space.base, full=False)
    for key, value in space.fixed.items():
        section, name = key.split(".")
        base.setdefault(section, {})[name] = value
    try:
        profile_from_dict(base, source=space.source)
    except ProfileError as exc:
        raise ParameterError("fixed", str(exc), "keys the profile schema accepts") from None
    keys = list(space.vary)
    combos = list(itertools.product(*(space.vary[k] for k in keys)))
    out = []
    for combo in combos:
        settings = dict(zip(keys, combo, strict=True))
        data = {s: dict(v) if isinstance(v, dict) else v for s, v in base.items()}
        for key, value in settings.items():
            section, name = VARY_KEYS[key]
            data.setdefault(section, {})[name] = value
        data["name"] = _label(settings)
        try:
            profile = profile_from_dict(data, source=space.source)
        except ProfileError:
            continue  # a combination the schema refuses (e.g. PDM with 5 levels)
        out.append((settings, profile))
    if len(out) > space.candidate_limit:
        raise ParameterError(
            "space", f"{len(out)} candidates", f"at most candidate_limit = {space.candidate_limit}"
        )
    return out


def predicted_range_with_dither_db(profile, *, weighting: str = "unweighted") -> float:
    """Linear-model dynamic range of a profile's loop in its chain, dither included (dB).

    :func:`~audiodsm.evaluate.search.predicted_dynamic_range_db` with the white noise at the
    quantizer raised by TPDF dither: peak ``d`` LSB adds ``d^2/6`` LSB^2 to the ``1/12`` LSB^2
    of the quantizer, i.e. ``10 log10(1 + 2 d^2)`` dB less range (Lipshitz et al. 1992).
    """
    from audiodsm.design.ntf import NoiseTransfer
    from audiodsm.evaluate.battery import battery_rate_hz
    from audiodsm.evaluate.search import _input_scale, predicted_dynamic_range_db

    mod = profile.modulator
    rate = battery_rate_hz(profile) * profile.upsampler.osr
    # the zeros where the chain puts them: optimized over 0..zero_band_edge_hz (capped at half
    # the audio rate)
    edge_hz = mod.zero_band_edge_hz
    edge = edge_hz / rate if edge_hz < 0.5 * battery_rate_hz(profile) else None
    ntf = NoiseTransfer.designed(
        mod.order,
        osr=profile.upsampler.osr,
        out_of_band_gain=mod.out_of_band_gain,
        zero_layout=mod.zero_layout,
        zero_band_edge=edge,
    )
    # the chain's own input scale (the dither takes headroom from the no-overload bound)
    scale = min(1.0, _input_scale(ntf, mod.levels, mod.dither_lsb))
    return predicted_dynamic_range_db(
        ntf,
        mod.levels,
        modulator_rate_hz=rate,
        input_scale=scale,
        dither_lsb=mod.dither_lsb,
        weighting=weighting,
    )


def cost_proxy(profile) -> float:
    """Clock (MHz) x levels x order, plus the PWM edge rate (MHz) for a PWM output.

    The PWM edge rate is the modulator rate times the edges per frame of one bridge leg: 2 for
    a double-edge carrier, 1 for a trailing-edge one.
    """
    from audiodsm.evaluate.battery import battery_rate_hz
    from audiodsm.evaluate.search import loop_cost

    rate = battery_rate_hz(profile) * profile.upsampler.osr
    mod = profile.modulator
    cost = loop_cost(mod.order, mod.levels, modulator_rate_hz=rate)
    if profile.output.kind == "pwm":
        edges = 2.0 if profile.output.pwm_carrier == "double-edge" else 1.0
        cost += rate * edges / 1e6
    return cost


def pareto_front(points) -> list:
    """Indices of the non-dominated points of ``(cost, margin)`` pairs, cheapest first.

    A point is dominated when another has cost <= and margin >= with one of them strict.
    Points with a margin of ``-inf`` (no reading) are never on the front.
    """
    order = sorted(range(len(points)), key=lambda i: (points[i][0], -points[i][1]))
    front, best = [], -math.inf
    for i in order:
        margin = points[i][1]
        if margin > best:
            front.append(i)
            best = margin
    return front


@dataclass(frozen=True)
class ExploredCandidate:
    """One candidate of the space: its settings, profile, prediction, cost and grade."""

    settings: dict
    profile: object
    predicted_db: float
    cost: float
    grade: object = None  # ProfileGrade, None when pruned or not reached


@dataclass(frozen=True)
class Exploration:
    """The outcome of :func:`explore_space`."""

    space: DesignSpace
    spec: object
    candidates: tuple
    front: tuple  # indices into candidates
    batch: object  # the GradeBatch of the survivors

    @property
    def pruned(self) -> int:
        """Candidates dropped by the linear model."""
        return sum(c.grade is None for c in self.candidates) - len(self.batch.unfinished)


def _margin(grade) -> float:
    m = grade.ranking_margin
    return 0.0 if m is None else m


def explore_space(space: DesignSpace, spec, *, cache_dir=None, plan=None, **batch_options):
    """Enumerate, prune, grade (cluster, cache) and find the front of a design space.

    Parameters
    ----------
    space : DesignSpace
    spec : SpecSheet
    cache_dir : path-like or None, keyword-only
        The grade cache; a rerun reads finished batteries back instead of running them.
    plan : BatteryPlan, optional, keyword-only
    **batch_options
        Passed to :func:`~audiodsm.evaluate.grade.grade_batch` (``jobs``, ``scheduler``,
        ``progress``, ``say``, ``battery``, ``seed``).

    Returns
    -------
    Exploration
    """
    from audiodsm.evaluate.grade import grade_batch

    entries = enumerate_candidates(space)
    dr_targets = [t for t in spec.targets if t.metric in _DR_METRICS and t.bound == "at_least"]
    candidates = []
    for settings, profile in entries:
        weighting = _DR_METRICS[dr_targets[0].metric] if dr_targets else "unweighted"
        predicted = predicted_range_with_dither_db(profile, weighting=weighting)
        candidates.append(ExploredCandidate(settings, profile, predicted, cost_proxy(profile)))
    keep = [
        i
        for i, c in enumerate(candidates)
        if not dr_targets or c.predicted_db >= dr_targets[0].limit - space.prune_slack_db
    ]
    options = dict(batch_options.pop("battery_options", None) or {})
    if plan is not None:
        options["plan"] = plan
    src = Path(space.source)
    survivors = [(src.with_name(candidates[i].profile.name + ".toml"), candidates[i].profile)
                 for i in keep]  # fmt: skip
    batch = grade_batch(
        survivors, spec, cache_dir=cache_dir, battery_options=options or None, **batch_options
    )
    by_name = {g.name: g for g in batch.grades}
    graded = []
    for i, c in enumerate(candidates):
        grade = by_name.get(c.profile.name) if i in keep else None
        graded.append(ExploredCandidate(c.settings, c.profile, c.predicted_db, c.cost, grade))
    with_grade = [i for i, c in enumerate(graded) if c.grade is not None]
    points = [(graded[i].cost, _margin(graded[i].grade)) for i in with_grade]
    front = tuple(with_grade[k] for k in pareto_front(points))
    return Exploration(space, spec, tuple(graded), front, batch)


def _parts_note(shown) -> str:
    """`` Candidates with random impairments ran 20 parts each ...`` (empty when none did)."""
    counts = sorted({len(c.grade.parts) for c in shown if c.grade.parts})
    if not counts:
        return ""
    text = " or ".join(str(n) for n in counts)
    return (
        f" Candidates with random impairments ran {text} parts each; their margins are "
        "graded over the parts (docs/grade.md, Parts)."
    )


def write_exploration(result: Exploration, folder) -> dict:
    """Write the front's profiles (TOML), the plot (PNG) and the report (HTML) into ``folder``.

    Returns
    -------
    dict
        ``{"profiles": [paths], "plot": path, "report": path}``.
    """
    from audiodsm.evaluate.grade_plots import plot_cost_against_margin
    from audiodsm.io_files import fit_file_name, replace_text_atomically
    from audiodsm.profile_text import profile_to_toml

    folder = Path(folder)
    (folder / "front").mkdir(parents=True, exist_ok=True)
    written = []
    for i in result.front:
        prof = result.candidates[i].profile
        path = folder / "front" / fit_file_name(prof.name + ".toml")
        written.append(replace_text_atomically(path, profile_to_toml(prof)))
    shown = [c for c in result.candidates if c.grade is not None]
    points = [(c.cost, _margin(c.grade), c.profile.name) for c in shown]
    on_front = {result.candidates[i].profile.name for i in result.front}
    fig = plot_cost_against_margin(points, on_front, title=f"{result.space.name}: cost and margin")
    plot = folder / "front.png"
    tmp = folder / ".front.png.partial"
    fig.savefig(tmp, dpi=110, format="png")
    tmp.replace(plot)
    rows = []
    for i in result.front:
        c = result.candidates[i]
        rows.append(
            "<tr>" + "".join(f"<td>{html.escape(str(v))}</td>" for v in (
                c.profile.name, f"{c.cost:.1f}", f"{_margin(c.grade):+.2f}",
                f"{c.predicted_db:.1f}", "pass" if c.grade.passed else "fail",
                f"front/{c.profile.name}.toml"
            )) + "</tr>"
        )  # fmt: skip
    pruned = sum(c.grade is None for c in result.candidates)
    page = (
        "<!doctype html><meta charset='utf-8'>"
        f"<title>{html.escape(result.space.name)}</title>"
        f"<h1>{html.escape(result.space.name)}</h1>"
        f"<p>{len(result.candidates)} candidates; {pruned} dropped by the linear model or not "
        f"reached; {len(shown)} graded against {html.escape(result.spec.name)}; "
        f"{len(result.front)} on the front.{_parts_note(shown)}</p>"
        "<p>Cost = modulator clock (MHz) &times; quantizer levels &times; loop order (+ PWM "
        "edge rate in MHz). Margin = the worst normalized spec margin (dB).</p>"
        "<img src='front.png' alt='cost against worst margin'>"
        "<table border='1' cellpadding='4'><tr><th>profile</th><th>cost</th>"
        "<th>worst margin (dB)</th><th>linear-model range (dB)</th><th>spec</th>"
        "<th>file</th></tr>" + "".join(rows) + "</table>"
    )
    report = replace_text_atomically(folder / "exploration.html", page)
    return {"profiles": written, "plot": plot, "report": report}
