"""The human table of `allocator verify --method importance` (formatting only, no arithmetic)."""

from __future__ import annotations

import click

from ..ppm import format_ppm
from .common import fmt, text_table, units_title
from .verify_text import finish_notes, limits_cell, simulated_as


def _ppm(value) -> str:
    """A cell under a [ppm] header; below 1e-6 ppm (where format_ppm says "< 0.001 ppb")
    in powers of ten, since those are the numbers this method is for."""
    if value is not None and 0 < value < 1e-6:
        return f"{value:.4g}"
    return format_ppm(value, unit=False)


def _beta(check) -> str:
    parts = []
    for side, beta in (("L", check.beta_lower), ("U", check.beta_upper)):
        if check.lower is None and side == "L" or check.upper is None and side == "U":
            continue
        parts.append(f"{side} {fmt(beta, 3) if beta is not None else '?'}")
    return ", ".join(parts)


def print_importance(case, result, source: str, plot, made_by: dict) -> None:
    """Print an :class:`allocator.importance.ImportanceVerification` for people."""
    click.echo(f"{case.title}  [{units_title(case)}]")
    click.echo(
        f"Importance sampling: {result.samples:,} assemblies per requirement, aimed at each limit's "
        f"most probable failure point; seed {result.seed} (repeat with --seed {result.seed}); {source}"
    )
    level = f"{result.confidence:.0%}"
    rows = []
    for c in result.requirements:
        rows.append(
            [
                c.name,
                limits_cell(c),
                f"{_ppm(c.fallout_ppm)} [{_ppm(c.ci_low_ppm)}, {_ppm(c.ci_high_ppm)}]",
                _ppm(c.form_ppm),
                _ppm(c.sorm_ppm),
                _beta(c),
                _ppm(c.rss_ppm),
                _ppm(c.mean_shift_ppm),
                _ppm(c.convolution_ppm),
                _ppm(c.target_ppm),
                c.status + ("" if c.decided else "*"),
            ]
        )
    click.echo("")
    click.echo(
        text_table(
            rows,
            [
                "requirement",
                "limits",
                f"fallout ppm [{level} CI]",
                "FORM ppm",
                "SORM ppm",
                "beta",
                "rss ppm",
                "mean-shift ppm",
                "convolution ppm",
                "target ppm",
                "verdict",
            ],
        )
    )
    notes = []
    if any(not c.decided for c in result.requirements):
        notes.append(f"* target inside the {level} interval: more samples would decide")
    for c in result.requirements:
        if c.form_note:
            notes.append(f"{c.name}: {c.form_note}")
        if c.hits < 30:
            notes.append(f"{c.name}: only {c.hits} failing assemblies drawn; the interval is rough")
        if c.undefined_ppm:
            notes.append(f"{c.name}: {format_ppm(c.undefined_ppm)} of assemblies with an undefined response, "
                         "counted as failures")
    notes += simulated_as(result, made_by)
    notes.append(
        "FORM and SORM are approximations beside the sampled estimate; beta in σ of the standard normal space"
    )
    notes.append(
        "statistical results assume stable, capable processes with the stated distributions (tails included); "
        "check safety-critical fits worst case"
    )
    finish_notes(notes, result, plot)
