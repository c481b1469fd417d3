"""The JSON helper shared by the battery, the grader and the reports."""

import json
import math

import numpy as np

from audiodsm.evaluate._plain import plain_scalar


def test_numpy_scalars_become_python_types_json_accepts():
    # json.dumps (Python standard library) refuses numpy scalars; the helper's output must pass it.
    out = [plain_scalar(v) for v in (np.float32(0.5), np.int64(-3), np.bool_(True), 2, "a", None)]
    assert [type(v) for v in out] == [float, int, bool, int, str, type(None)]
    assert json.loads(json.dumps(out)) == [0.5, -3, True, 2, "a", None]


def test_non_finite_floats_become_none_unless_kept():
    # RFC 8259 has no literal for inf or NaN, hence None by default.
    assert plain_scalar(np.float64(np.inf)) is None
    assert plain_scalar(float("nan")) is None
    assert math.isinf(plain_scalar(np.float64(-np.inf), finite_only=False))


def test_other_objects_are_kept_or_given_as_repr():
    assert plain_scalar((1, 2)) == (1, 2)
    assert plain_scalar((1, 2), repr_other=True) == "(1, 2)"
    assert plain_scalar("x", repr_other=True) == "x"
    assert plain_scalar(None, repr_other=True) is None
