"""Entry point of the ``twinray`` command.

Subcommands live in their own modules and are imported only when used, so
``twinray --help`` and short jobs start quickly. Every error that reaches the
user is one line starting with ``error:``; ``--debug`` shows the traceback.
"""

from __future__ import annotations

import importlib
import sys

import click

#: subcommand name -> "module:attribute" of its click command.
COMMANDS = {
    "demo": "twinray.cli.demo:demo_command",
    "calibrate": "twinray.cli.calibrate:calibrate_command",
    "reconstruct": "twinray.cli.reconstruct:reconstruct_command",
    "inspect": "twinray.cli.inspect_cmd:inspect_command",
    "sinogram": "twinray.cli.sinogram:sinogram_command",
    "dynamic": "twinray.cli.dynamic:dynamic_command",
    "resample": "twinray.cli.resample:resample_command",
    "tac": "twinray.cli.tac:tac",
    "simulate": "twinray.cli.simulate:simulate_command",
    "normalize": "twinray.cli.normalize:normalize_command",
}


class LazyGroup(click.Group):
    """A click group that imports each subcommand's module on first use."""

    def list_commands(self, ctx):
        return sorted(COMMANDS)

    def get_command(self, ctx, name):
        target = COMMANDS.get(name)
        if target is None:
            return None
        module, attr = target.split(":")
        return getattr(importlib.import_module(module), attr)


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(package_name="twinray", prog_name="twinray")
def cli():
    """twinray: PET list-mode events to corrected sinograms, images,
    dynamic frames and noise studies.

    Research software; not a medical device.

    Run `twinray COMMAND --help` for the options and examples of a command.
    """


def main(argv=None) -> int:
    """Run the command line; returns the exit code (never raises)."""
    from ._common import run_cli

    return run_cli(cli, sys.argv[1:] if argv is None else list(argv))


if __name__ == "__main__":
    sys.exit(main())
