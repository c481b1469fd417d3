"""Checks shared by the tests of profile keys."""

import pytest
from click.testing import CliRunner

from audiodsm.cli import main
from audiodsm.errors import ProfileError
from audiodsm.profile import load_profile


def assert_refused_at_load(path, key, words):
    """The profile file ``path`` is refused at load: one line naming ``key`` with ``words``.

    Also through the command line: `measure` exits with 2, names the key and shows no
    traceback (nothing is computed first).
    """
    with pytest.raises(ProfileError) as info:
        load_profile(path)
    message = str(info.value)
    assert "\n" not in message and info.value.key == key and words in message
    result = CliRunner().invoke(main, ["measure", str(path)])
    assert result.exit_code == 2
    assert key in result.output and "Traceback" not in result.output
