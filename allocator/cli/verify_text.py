"""Text pieces both tables of `allocator verify` print (Monte Carlo and importance sampling)."""

from __future__ import annotations

import click

from .common import fmt


def limits_cell(check) -> str:
    """``[lower, upper] units`` of a requirement check, for the limits column."""
    return f"[{fmt(check.lower, 6)}, {fmt(check.upper, 6)}]" + (f" {check.units}" if check.units else "")


def simulated_as(result, made_by: dict) -> list[str]:
    """Note lines on what the run assumed: the process that makes each part, the mean shifts."""
    notes = []
    if made_by:
        parts = [f"{name} by {p}" if p else f"{name} by none of its processes (own cp)" for name, p in made_by.items()]
        shown = ", ".join(parts[:6]) + (f" and {len(parts) - 6} more (--json lists all)" if len(parts) > 6 else "")
        notes.append(f"simulated with the cp of the process that makes each part: {shown}")
    if result.assumption_note:
        notes.append(f"note: {result.assumption_note}")
    elif any(c.shift_side for c in result.requirements):
        notes.append("mean shifts placed on the worse side of each requirement")
    return notes


def finish_notes(notes: list[str], result, plot) -> None:
    """Print the notes (and where the plot went) after a blank line, then the result line."""
    if plot is not None:
        notes.append(f"plot written to {plot}")
    click.echo("")
    for line in notes:
        click.echo(line)
    click.echo(f"result: {result.status} - {result.message}")
