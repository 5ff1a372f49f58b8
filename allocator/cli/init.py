"""``allocator init PATH``: write a commented starter case file."""

from __future__ import annotations

from importlib import resources
from pathlib import Path

import click

from ..errors import UsageError
from ..files import atomic_write
from .common import FilePath, handle_errors


def starter_text() -> str:
    """The starter case shipped with the package (an invented, commented example)."""
    return (resources.files("allocator") / "templates" / "starter.toml").read_text(encoding="utf-8")


@click.command()
@click.argument("path", type=FilePath())
@click.option("--force", is_flag=True, help="Overwrite PATH if it already exists.")
@handle_errors
def init(path, force):
    """Write a commented starter case to PATH (an invented example to edit)."""
    target = Path(path)
    if target.exists() and not force:
        raise UsageError(f"{target}: already exists (use --force to overwrite it)")
    atomic_write(target, starter_text())
    click.echo(f"wrote {target}")
