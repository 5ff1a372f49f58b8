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
    "offer": ("allocator.cli.offer", "offer"),
    "study": ("allocator.cli.study", "study"),
    "convert": ("allocator.cli.convert", "convert"),
    "fit-costs": ("allocator.cli.fit_costs", "fit_costs"),
    "capability": ("allocator.cli.capability", "capability"),
}

# the one-line summaries `allocator --help` lists (whole, never cut off with "..."; listing
# them needs no command module imported)
SUMMARIES = {
    "init": "Write a commented starter case file.",
    "analyze": "Analyse the stack at the current tolerances.",
    "allocate": "Find the least-cost tolerances.",
    "frontier": "Least cost against a limit or fallout target.",
    "verify": "Check tolerances by simulation (Monte Carlo or importance sampling).",
    "report": "Write an HTML report for a design review.",
    "offer": "Evaluate supplier offers: saving, break-even price.",
    "study": "Allocate many cases at once: savings per case and in total.",
    "convert": "Convert a case between TOML and an .xlsx workbook.",
    "fit-costs": "Fit cost curves to supplier quotes.",
    "capability": "Cp, Cpk and mean shift from measured parts.",
}


class LazyGroup(click.Group):
    def list_commands(self, ctx):
        return list(COMMANDS)

    def format_commands(self, ctx, formatter):
        with formatter.section("Commands"):
            formatter.write_dl([(name, self._summary(ctx, name)) for name in COMMANDS])

    def _summary(self, ctx, name):
        if name in SUMMARIES:
            return SUMMARIES[name]
        # a command without a summary here: its docstring's first sentence, whole
        return self.get_command(ctx, name).get_short_help_str(limit=10_000)

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
    fails), 2 bad input or usage, 3 an internal error (a bug; please report it).
    """


def main(argv=None):
    """Console-script entry point.

    A reader of stdout that goes away early (``allocator allocate CASE | head -1``) ends the
    command quietly (see :func:`~allocator.cli.common.exit_quietly_on_broken_pipe`).
    """
    try:
        cli.main(args=argv, prog_name="allocator")
    except BrokenPipeError:
        from .common import exit_quietly_on_broken_pipe

        exit_quietly_on_broken_pipe()
