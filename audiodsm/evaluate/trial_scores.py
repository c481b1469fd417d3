"""Scoring of blind A/B/X trials: saved answers against the key, with exact binomial p-values.

A listener who hears no difference answers each trial right with probability 1/2; the chance
of getting ``correct`` or more of ``trials`` right by guessing is the one-sided binomial tail,
computed here exactly with integers. A pair whose p-value is below :data:`SIGNIFICANCE` (the
usual 0.05) is reported as heard; otherwise the result says only that no difference was shown.

The answers file must belong to the key: same set, the same trials in the same order, every
trial answered once with A or B, and an unchanged check value (see
:func:`audiodsm.evaluate.listening.answers_check`). Anything else is refused with the reason.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

from audiodsm.errors import AudiodsmError, ParameterError

__all__ = [
    "SIGNIFICANCE",
    "AnswersError",
    "PairScore",
    "binomial_tail_p",
    "read_key",
    "read_answers",
    "score_answers",
    "scores_table",
]

#: The level below which a pair's result counts as a heard difference (common practice).
SIGNIFICANCE = 0.05


class AnswersError(AudiodsmError, ValueError):
    """An answers file or key that cannot be scored (wrong set, edited, truncated, ...)."""

    def __init__(self, path, reason: str):
        self.path = str(path)
        self.reason = reason
        super().__init__(f"{self.path}: {reason}")


@dataclass(frozen=True)
class PairScore:
    """The blind-trial result of one pair of candidates.

    Attributes
    ----------
    pair : str
        ``"<A> / <B>"``.
    trials, correct : int
    p_value : float
        Exact one-sided binomial probability of ``correct`` or more by guessing.
    heard : bool
        ``p_value < SIGNIFICANCE``.
    verdict : str
        The result in plain words.
    """

    pair: str
    trials: int
    correct: int
    p_value: float
    heard: bool
    verdict: str

    def to_dict(self) -> dict:
        """Plain JSON-ready fields."""
        return {
            "pair": self.pair,
            "trials": self.trials,
            "correct": self.correct,
            "p_value": self.p_value,
            "heard": self.heard,
            "verdict": self.verdict,
        }


def binomial_tail_p(trials: int, correct: int) -> float:
    """P(K >= correct) for K ~ Binomial(trials, 1/2), computed exactly.

    Parameters
    ----------
    trials : int
        Number of trials, at least 0.
    correct : int
        Right answers, 0 to ``trials``.

    Returns
    -------
    float
        ``sum_{k=correct}^{trials} C(trials, k) / 2**trials`` (1.0 for ``correct = 0``).

    Raises
    ------
    ParameterError
        Negative counts or more right answers than trials.

    References
    ----------
    .. [1] W. Feller, "An Introduction to Probability Theory and Its Applications", vol. 1,
       3rd ed., Wiley, 1968, ch. VI.2-3 (the binomial distribution and its tails).
    """
    if not (isinstance(trials, int) and isinstance(correct, int)):
        raise ParameterError("trials, correct", (trials, correct), "integers")
    if trials < 0 or not 0 <= correct <= trials:
        raise ParameterError("correct", (trials, correct), "0 <= correct <= trials")
    tail = sum(math.comb(trials, k) for k in range(correct, trials + 1))
    return float(Fraction(tail, 2**trials))


def _verdict(trials: int, correct: int, p: float) -> str:
    if trials == 0:
        return "no trials"
    if p < SIGNIFICANCE:
        return (
            f"a difference was heard: {correct} of {trials} right is unlikely by guessing "
            f"(p = {p:.3g} < {SIGNIFICANCE})"
        )
    return (
        f"no difference shown: {correct} of {trials} right could well be guessing "
        f"(p = {p:.3g} >= {SIGNIFICANCE}); this does not prove the two sound the same"
    )


def _load_json(path, what):
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise AnswersError(p, f"cannot read the {what} ({exc.strerror})") from None
    except UnicodeDecodeError:
        raise AnswersError(p, f"the {what} is not UTF-8 text") from None
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        cut = exc.pos >= len(text.rstrip()) or not text.rstrip().endswith("}")
        end = "ends early (truncated?)" if cut else "is malformed"
        raise AnswersError(p, f"the {what} {end}: {exc.msg} at character {exc.pos}") from None


def read_key(path) -> dict:
    """Read and check a blind-trial key (``<set folder>.key.json``).

    Raises
    ------
    AnswersError
        Not a key of this program's format, or malformed.
    """
    from audiodsm.evaluate.listening import KEY_FORMAT

    key = _load_json(path, "key")
    ok = (
        isinstance(key, dict)
        and key.get("format") == KEY_FORMAT
        and isinstance(key.get("set_id"), str)
        and isinstance(key.get("trials"), list)
        and all(
            isinstance(t, dict) and {"trial", "pair", "x_is"} <= set(t) and t["x_is"] in "AB"
            for t in key["trials"]
        )
    )
    if not ok:
        raise AnswersError(path, f"not a blind-trial key (expected format {KEY_FORMAT!r})")
    return key


def read_answers(path, key: dict) -> dict:
    """Read an answers file and check that it belongs to ``key``; trial id -> "A"/"B".

    Raises
    ------
    AnswersError
        Wrong format, another set, other or missing or repeated trials, answers other than
        A or B, or a check value that does not match (edited by hand).
    """
    from audiodsm.evaluate.listening import ANSWERS_FORMAT, answers_check

    doc = _load_json(path, "answers file")
    if not isinstance(doc, dict) or doc.get("format") != ANSWERS_FORMAT:
        raise AnswersError(path, f"not an answers file (expected format {ANSWERS_FORMAT!r})")
    if doc.get("set_id") != key["set_id"]:
        raise AnswersError(
            path,
            f"answers for set {doc.get('set_id')!r}, but the key is for set {key['set_id']!r}",
        )
    answers = doc.get("answers")
    if not isinstance(answers, list) or not all(
        isinstance(a, dict) and isinstance(a.get("trial"), str) for a in answers
    ):
        raise AnswersError(path, "'answers' is not a list of {trial, answer} entries")
    expected = [t["trial"] for t in key["trials"]]
    got = [a["trial"] for a in answers]
    if len(set(got)) != len(got):
        raise AnswersError(path, "a trial is answered more than once")
    foreign = sorted(set(got) - set(expected))
    if foreign:
        raise AnswersError(path, "answers for trials the key does not hold: " + ", ".join(foreign))
    if len(got) < len(expected):
        raise AnswersError(
            path, f"answers {len(got)} of {len(expected)} trials (incomplete or truncated)"
        )
    if got != expected:
        raise AnswersError(path, "the trials are not in the order of the key (edited?)")
    bad = [a["trial"] for a in answers if a.get("answer") not in ("A", "B")]
    if bad:
        raise AnswersError(path, "answers other than A or B for " + ", ".join(bad))
    if doc.get("check") != answers_check(key["set_id"], answers):
        raise AnswersError(path, "the check value does not match the answers (edited by hand?)")
    return {a["trial"]: a["answer"] for a in answers}


def score_answers(answers_path, key_path) -> list[PairScore]:
    """Score saved answers against the key, one result per pair of candidates.

    Parameters
    ----------
    answers_path, key_path : path-like

    Returns
    -------
    list of PairScore
        In the order the pairs first appear in the key.

    Raises
    ------
    AnswersError
        See :func:`read_key` and :func:`read_answers`.

    References
    ----------
    .. [1] Feller (1968), see :func:`binomial_tail_p`.
    .. [2] D. L. Clark, "High-resolution subjective testing using a double-blind comparator",
       J. Audio Eng. Soc. 30(5), 1982, pp. 330-338 (A/B/X scoring by the binomial tail).
    """
    key = read_key(key_path)
    given = read_answers(answers_path, key)
    counts: dict[str, list[int]] = {}
    for t in key["trials"]:
        c = counts.setdefault(t["pair"], [0, 0])
        c[0] += 1
        c[1] += given[t["trial"]] == t["x_is"]
    out = []
    for pair, (n, k) in counts.items():
        p = binomial_tail_p(n, k)
        out.append(PairScore(pair, n, k, p, p < SIGNIFICANCE, _verdict(n, k, p)))
    return out


def scores_table(scores) -> list[str]:
    """Text lines: a table of trials, right answers and p-value per pair, then the verdicts.

    Parameters
    ----------
    scores : sequence of PairScore

    Returns
    -------
    list of str
    """
    width = max([len("pair")] + [len(s.pair) for s in scores])
    lines = [f"{'pair'.ljust(width)}  trials  right  p (one-sided)"]
    for s in scores:
        lines.append(f"{s.pair.ljust(width)}  {s.trials:6d}  {s.correct:5d}  {s.p_value:.4g}")
    lines += [f"{s.pair}: {s.verdict}" for s in scores]
    return lines
