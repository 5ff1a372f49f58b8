"""Entry point: a click group whose commands are imported only when called."""

from __future__ import annotations

import importlib

import click

from .. import __version__

# command name -> (module, function); one module per command keeps imports lazy
COMMANDS = {
    "init": ("allocator.cli.init", "init"),
    "analyze": ("allocator.cli.analyze", "analyze"),
    "allocate": ("allocator.cli.allocate", "allocate"),
    "frontier": ("allocator.cli.frontier", "frontier"),
    "verify": ("allocator.cli.verify", "verify"),
    "report": ("allocator.cli.report", "report"),
}


class LazyGroup(click.Group):
    def list_commands(self, ctx):
        return list(COMMANDS)

    def get_command(self, ctx, name):
        if name not in COMMANDS:
            return None
        module, attr = COMMANDS[name]
        return getattr(importlib.import_module(module), attr)


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="allocator")
def cli():
    """Least-cost tolerance allocation for assembly stacks.

    Exit codes: 0 success, 1 a requirement cannot be met (or a verification
    fails), 2 bad input or usage.
    """


def main(argv=None):
    """Console-script entry point."""
    cli.main(args=argv, prog_name="allocator")
