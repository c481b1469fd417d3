"""The ``audiodsm`` command: a thin shell over the library.

Each sub-command lives in its own module of this package and is imported only when
it runs, so ``audiodsm --help`` stays fast. Library errors (:class:`AudiodsmError`)
become one line on stderr and exit code 2.
"""

from __future__ import annotations

import importlib
import sys

import click

from audiodsm import __version__
from audiodsm.errors import AudiodsmError

# command name -> "module:function"
COMMANDS = {
    "analyze": "audiodsm.cli.analyze:analyze",
    "render": "audiodsm.cli.render:render",
    "measure": "audiodsm.cli.measure:measure",
    "grade": "audiodsm.cli.grade:grade",
    "design": "audiodsm.cli.design:design",
    "plan": "audiodsm.cli.handoff:plan",
    "handoff": "audiodsm.cli.handoff:handoff",
}


class _LazyGroup(click.Group):
    """A click group that imports each sub-command's module on first use."""

    def list_commands(self, ctx):
        return sorted(name for name in COMMANDS if self._load(name) is not None)

    def get_command(self, ctx, name):
        return self._load(name)

    @staticmethod
    def _load(name):
        target = COMMANDS.get(name)
        if target is None:
            return None
        module_name, attr = target.split(":")
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            if exc.name == module_name:  # command not built yet in this checkout
                return None
            raise
        return getattr(module, attr)

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except AudiodsmError as exc:
            click.echo(f"audiodsm: error: {exc}", err=True)
            sys.exit(2)


@click.group(cls=_LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="audiodsm")
def main():
    """Design, simulate, measure and grade delta-sigma noise shapers for audio."""
