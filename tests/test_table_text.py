"""The aligned text tables shared by the measure, grade and design commands."""

from audiodsm.evaluate.tables import aligned_lines


def test_columns_align_and_rule_matches_widths():
    rows = [("name", "value"), ("a", "1.5"), ("longer", "-20.25")]
    lines = aligned_lines(rows, right=(1,), rule=True)
    assert lines == [
        "name     value",
        "------  ------",
        "a          1.5",
        "longer  -20.25",
    ]
    # every line ends where its last cell ends: no trailing spaces
    assert all(line == line.rstrip() for line in lines)


def test_left_aligned_last_column_leaves_no_padding():
    lines = aligned_lines([("x", "long text"), ("10", "y")], right=(0,))
    assert lines == [" x  long text", "10  y"]
