import json
import re

import pytest
from click.testing import CliRunner

from audiodsm.cli import main
from audiodsm.errors import ParameterError
from audiodsm.evaluate.listening import ANSWERS_FORMAT, KEY_FORMAT, answers_check
from audiodsm.evaluate.trial_scores import (
    AnswersError,
    binomial_tail_p,
    score_answers,
)

# (trials, correct): small and large counts, both tails, all right and none right
TABLE = [(1, 0), (1, 1), (5, 5), (8, 6), (10, 7), (10, 8), (10, 9), (16, 12), (20, 14),
         (20, 15), (25, 18), (50, 32), (100, 61), (12, 0), (7, 3)]  # fmt: skip


@pytest.mark.parametrize(("trials", "correct"), TABLE)
def test_exact_binomial_p_equals_scipy_binomtest(trials, correct):
    # reference: scipy.stats.binomtest, one-sided ("greater"), chance 1/2
    from scipy.stats import binomtest

    ref = binomtest(correct, trials, 0.5, alternative="greater").pvalue
    assert binomial_tail_p(trials, correct) == pytest.approx(ref, rel=1e-12, abs=0)


def test_binomial_textbook_values():
    # by hand: 9 or 10 of 10 right = (10 + 1) / 1024; 12 of 16: (1820+560+120+16+1)/65536
    assert binomial_tail_p(10, 9) == 11 / 1024
    assert binomial_tail_p(16, 12) == 2517 / 65536
    assert binomial_tail_p(4, 0) == 1.0


@pytest.mark.parametrize(("trials", "correct"), [(-1, 0), (3, 4), (3, -1), (3.0, 1)])
def test_binomial_refuses_impossible_counts(trials, correct):
    with pytest.raises(ParameterError):
        binomial_tail_p(trials, correct)


def make_key(tmp_path, x_is="ABBAABABBA", pairs=("p / q",), set_id="s1"):
    trials = []
    n = 0
    for pair in pairs:
        for x in x_is:
            n += 1
            trials.append({"trial": f"t{n:02d}", "pair": pair, "input": "in.wav", "x_is": x})
    key = {"format": KEY_FORMAT, "set_id": set_id, "trials": trials}
    path = tmp_path / "set.key.json"
    path.write_text(json.dumps(key))
    return path, key


def write_answers(tmp_path, key, given, *, set_id=None, name="answers.json", check=None):
    answers = [
        {"trial": t["trial"], "answer": a} for t, a in zip(key["trials"], given, strict=False)
    ]
    sid = set_id or key["set_id"]
    doc = {
        "format": ANSWERS_FORMAT,
        "set_id": sid,
        "answers": answers,
        "check": check or answers_check(sid, answers),
    }
    path = tmp_path / name
    path.write_text(json.dumps(doc, indent=2))
    return path


def test_scores_per_pair(tmp_path):
    key_path, key = make_key(tmp_path, pairs=("p / q", "p / r"))
    truth = [t["x_is"] for t in key["trials"]]
    # pair 1: all 10 right; pair 2: 5 of 10 right
    given = truth[:10] + [
        x if i % 2 else ("A" if x == "B" else "B") for i, x in enumerate(truth[10:])
    ]
    scores = score_answers(write_answers(tmp_path, key, given), key_path)
    assert [(s.pair, s.trials, s.correct) for s in scores] == [("p / q", 10, 10), ("p / r", 10, 5)]
    assert scores[0].p_value == 1 / 1024 and scores[0].heard
    assert not scores[1].heard and "no difference shown" in scores[1].verdict


def test_score_command_prints_and_gives_json(tmp_path):
    key_path, key = make_key(tmp_path)
    answers = write_answers(tmp_path, key, [t["x_is"] for t in key["trials"]])
    r = CliRunner().invoke(main, ["score-answers", str(answers), "--key", str(key_path)])
    assert r.exit_code == 0, r.output
    assert "a difference was heard" in r.output and "0.0009766" in r.output
    r = CliRunner().invoke(main, ["score-answers", str(answers), "--key", str(key_path), "--json"])
    doc = json.loads(r.output)
    assert doc["pairs"][0] == {
        "pair": "p / q", "trials": 10, "correct": 10, "p_value": 1 / 1024, "heard": True,
        "verdict": doc["pairs"][0]["verdict"],
    }  # fmt: skip


def bad_answers(tmp_path, key, case):
    truth = [t["x_is"] for t in key["trials"]]
    if case == "other set":
        return write_answers(tmp_path, key, truth, set_id="another")
    if case == "other trials":
        path = write_answers(tmp_path, key, truth)
        doc = json.loads(path.read_text())
        for a in doc["answers"]:
            a["trial"] = a["trial"].replace("t", "u")
        doc["check"] = answers_check(doc["set_id"], doc["answers"])
        path.write_text(json.dumps(doc))
        return path
    if case == "edited":
        path = write_answers(tmp_path, key, truth)
        doc = json.loads(path.read_text())
        doc["answers"][0]["answer"] = "B" if truth[0] == "A" else "A"
        path.write_text(json.dumps(doc))
        return path
    if case == "truncated file":
        path = write_answers(tmp_path, key, truth)
        path.write_text(path.read_text()[:150])
        return path
    if case == "missing trials":
        return write_answers(tmp_path, key, truth[:7])
    if case == "repeated trial":
        path = write_answers(tmp_path, key, truth)
        doc = json.loads(path.read_text())
        doc["answers"][1] = dict(doc["answers"][0])
        doc["check"] = answers_check(doc["set_id"], doc["answers"])
        path.write_text(json.dumps(doc))
        return path
    if case == "answer not A or B":
        return write_answers(tmp_path, key, ["C"] + truth[1:])
    if case == "not answers":
        path = tmp_path / "answers.json"
        path.write_text(json.dumps({"hello": 1}))
        return path
    raise AssertionError(case)


REASONS = {
    "other set": "the key is for set 's1'",
    "other trials": "trials the key does not hold",
    "edited": "check value does not match",
    "truncated file": "ends early (truncated?)",
    "missing trials": "answers 7 of 10 trials",
    "repeated trial": "more than once",
    "answer not A or B": "other than A or B",
    "not answers": "not an answers file",
}


@pytest.mark.parametrize("case", sorted(REASONS))
def test_answers_not_matching_the_key_are_refused_with_the_reason(tmp_path, case):
    key_path, key = make_key(tmp_path)
    answers = bad_answers(tmp_path, key, case)
    with pytest.raises(AnswersError, match=re.escape(REASONS[case])):
        score_answers(answers, key_path)
    before = key_path.read_bytes()
    r = CliRunner().invoke(main, ["score-answers", str(answers), "--key", str(key_path)])
    assert r.exit_code == 2
    assert REASONS[case] in r.output and len(r.output.strip().splitlines()) == 1
    assert key_path.read_bytes() == before


def test_a_file_that_is_not_a_key_is_refused(tmp_path):
    key_path, key = make_key(tmp_path)
    answers = write_answers(tmp_path, key, [t["x_is"] for t in key["trials"]])
    r = CliRunner().invoke(main, ["score-answers", str(answers), "--key", str(answers)])
    assert r.exit_code == 2 and "not a blind-trial key" in r.output


def test_answers_check_is_crc32_of_the_listed_text():
    # zlib.crc32 (ISO/IEC 3309 CRC-32); the page's JavaScript computes the same text's CRC
    import zlib

    answers = [{"trial": "t01", "answer": "A"}, {"trial": "t02", "answer": "B"}]
    assert answers_check("abc", answers) == f"{zlib.crc32(b'abc;t01=A;t02=B'):08x}"
    # a value computed by an independent CRC-32 (the standard check value of "123456789")
    assert f"{zlib.crc32(b'123456789'):08x}" == "cbf43926"
