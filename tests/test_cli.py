from click.testing import CliRunner

from audiodsm import __version__
from audiodsm.cli import main


def test_version_and_help():
    runner = CliRunner()
    result = runner.invoke(main, ["--version"])
    assert result.exit_code == 0
    assert __version__ in result.output
    result = runner.invoke(main, ["--help"])
    assert result.exit_code == 0
    assert "Usage" in result.output
