"""The short summary page of a study of many cases (``allocator study -o study.html``).

One self-contained HTML file, in the design-review report's style (its stylesheet, tables,
number formatting and cautions; :mod:`allocator.report.sections`): the study's verdict, a
greyscale bar chart of the saving per assembly per case and model (inline SVG), the totals,
the table of every case and model, and the cautions. It only formats a
:class:`~allocator.studies.Study`; every number comes from the study.
"""

from __future__ import annotations

import os
from pathlib import Path

from .. import __version__
from .. import status as _status
from .html import MODEL_LABELS, Row, esc, facts_list, flag, model_name, num, saving, table

__all__ = ["MAX_CHART_CASES", "study_html", "study_savings_figure", "write_study_page"]

MAX_CHART_CASES = 60  # more cases than this: the chart shows those with the largest savings
_HATCHES = {"worst-case": "", "rss": "///", "mean-shift": "..."}


def _case_label(row) -> str:
    return Path(row.file).name


def chart_rows(study) -> tuple[list[str], list, bool]:
    """The cases the chart shows (file names), the solved rows, and whether some were left out."""
    solved = [r for r in study.rows if r.success and r.saving is not None]
    best: dict[str, float] = {}
    for r in solved:
        best[r.file] = max(best.get(r.file, r.saving), r.saving)
    files = [f for f in study.files if f in best]
    cut = len(files) > MAX_CHART_CASES
    if cut:
        keep = set(sorted(files, key=lambda f: -best[f])[:MAX_CHART_CASES])
        files = [f for f in files if f in keep]
    return files, [r for r in solved if r.file in set(files)], cut


def study_savings_figure(study):
    """Horizontal bars: the saving per assembly of each solved case, one bar per model.

    Greys and hatches per model (:func:`allocator.plots.series_style`), so the chart reads
    the same in greyscale; a dearer allocation (negative saving) points left of zero.
    """
    from .. import plots

    files, rows, _ = chart_rows(study)
    models = list(dict.fromkeys(r.model for r in rows))
    height = 1.2 + 0.16 * max(1, len(files)) * max(1, len(models))
    figure = plots.new_figure(7.0, min(max(height, 2.4), 60.0))
    ax = figure.add_subplot()
    bar = 0.8 / max(1, len(models))
    position = {f: i for i, f in enumerate(files)}
    for k, model in enumerate(models):
        mine = [r for r in rows if r.model == model]
        style = plots.series_style(model)
        ax.barh(
            [position[r.file] + (k - (len(models) - 1) / 2) * bar for r in mine],
            [r.saving for r in mine],
            height=bar,
            color=style["color"] if model == "worst-case" else "white",
            edgecolor=style["color"],
            hatch=_HATCHES.get(model, "xx"),
            linewidth=0.8,
            label=MODEL_LABELS.get(model, model),
        )
    ax.axvline(0.0, color="0.0", linewidth=0.8)
    ax.set_yticks(range(len(files)), [Path(f).name for f in files], fontsize="small")
    ax.invert_yaxis()  # first case on top, as in the table
    currencies = {r.currency for r in rows}
    unit = f" [{next(iter(currencies))}]" if len(currencies) == 1 and next(iter(currencies)) else ""
    ax.set_xlabel(f"saving per assembly{unit}")
    plots.finish_axes(ax)
    return figure


def _chart(study) -> str:
    from .figures import inline_svg, svg_context, svg_of

    files, rows, cut = chart_rows(study)
    if not rows:
        return '<p class="note">No case was solved: nothing to chart.</p>'
    with svg_context():
        svg = svg_of(study_savings_figure(study))
    note = (f" The {MAX_CHART_CASES} cases with the largest savings of {len(study.files)}; the table lists all."
            if cut else "")
    return (
        f'<figure class="plot">{inline_svg(svg, "savings", "Saving per assembly per case and model")}'
        f"<figcaption>Saving per assembly against the current tolerances, per case; one bar per "
        f"stack model (solid: worst case, hatched: RSS, dotted: mean shift).{note}</figcaption></figure>"
    )


def _status_cell(row) -> str:
    kind = "" if row.success else "bad"
    return flag(row.status, kind)


def _cases_table(study) -> str:
    rows = []
    for r in study.rows:
        money = f"&nbsp;{esc(r.currency)}" if r.currency else ""
        prices = "<br>".join(f"{esc(n)} {num(p)}" for n, p in r.largest_prices) or "—"
        rows.append([
            esc(_case_label(r)) + (f"<br><small>{esc(r.title)}</small>" if r.title else ""),
            model_name(r.model) if r.model else "—",
            _status_cell(r) + ("" if r.success else f"<br><small>{esc(r.message)}</small>"),
            num(r.current_cost) + (money if r.current_cost is not None else ""),
            num(r.total_cost) + (money if r.total_cost is not None else ""),
            saving(r.saving),
            saving(r.saving_percent, 3, percent=True),
            "—" if r.volume is None else esc(f"{r.volume:,.0f}"),
            saving(r.saving_per_year, 6),
            "<br>".join(esc(b) for b in r.binding) or "—",
            prices,
        ])
    headers = ["Case", "Model", "Status", "Current cost", "Least cost", "Saving / assembly", "Saving %",
               "Volume / year", "Saving / year", "Binding", "Largest shadow prices"]
    numeric = [False, False, False, True, True, True, True, True, True, False, False]
    return table(headers, rows, numeric=numeric, cls="compact",
                 caption="Every case and model: costs per assembly, savings, the requirements that bind and "
                         "the contributors whose tolerances they price highest [currency per length unit]")


def _totals_table(study) -> str:
    rows = []
    for t in study.totals:
        money = f" [{esc(t.currency)}]" if t.currency else ""
        rows.append(Row([
            model_name(t.model) + money,
            f"{t.solved} of {t.cases}",
            num(t.current_cost),
            num(t.total_cost),
            saving(t.saving),
            saving(t.saving_per_year, 6) + (f" ({t.with_volume} with a volume)" if t.saving_per_year is not None else ""),
        ], "sum"))
    return table(["Model", "Solved", "Current cost", "Least cost", "Saving / assembly", "Saving / year"], rows,
                 numeric=[False, True, True, True, True, True],
                 caption="Totals over the solved cases: one assembly of each design; per year where the case gives a volume")


def study_html(study, title: str = "Cost-reduction study") -> str:
    """The page as HTML text (self-contained: inline CSS and SVG, no scripts, no links out)."""
    from .sections import CAUTIONS, stylesheet

    alert = ""
    if not study.success:
        alert = (f'<div class="alert" role="alert"><p><strong>Attention: {esc(study.status.upper())}.</strong> '
                 f"{esc(study.message)}. Those rows give their reason in the table.</p></div>")
    counts = {}
    for r in study.rows:
        counts[r.status] = counts.get(r.status, 0) + 1
    facts = [
        ("Cases", esc(len(study.files))),
        ("Rows (case × model)", esc(len(study.rows))),
        *((esc(word), esc(counts[word])) for word in _status.STUDY if word in counts),
    ]
    cautions = "".join(f"<li>{esc(text)}</li>" for text in CAUTIONS)
    body = [
        "<header>",
        '<p class="kicker">Tolerance allocation study</p>',
        f"<h1>{esc(title)}</h1>",
        f'<p class="meta">{esc(len(study.files))} cases · allocator {esc(__version__)}</p>',
        alert or f'<p class="verdict">{esc(study.message)}.</p>',
        '<aside class="caution-brief" role="note"><p><strong>Caution.</strong> Statistical results assume '
        "stable, capable processes; safety-critical fits must be checked worst case and against the "
        'applicable codes with qualified review. <a href="#cautions">All cautions</a>.</p></aside>',
        "</header>",
        "<main>",
        '<section id="summary"><h2>Summary</h2>' + facts_list(facts) + _totals_table(study) + "</section>",
        '<section id="savings"><h2>Savings per case</h2>' + _chart(study) + "</section>",
        '<section id="cases"><h2>Cases</h2>' + _cases_table(study) + "</section>",
        f'<section id="cautions"><h2>Cautions</h2><div class="cautions"><ul>{cautions}</ul></div></section>',
        "</main>",
    ]
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f'<meta name="generator" content="allocator {esc(__version__)}">\n'
        f"<title>{esc(title)}</title>\n<style>\n{stylesheet()}</style>\n</head>\n<body>\n"
        + "\n".join(part for part in body if part)
        + "\n</body>\n</html>\n"
    )


def write_study_page(study, path: str | os.PathLike) -> Path:
    """Write :func:`study_html` to ``path`` atomically, never over one of the study's case files."""
    from ..files import atomic_write

    return atomic_write(path, study_html(study), protect=study.files)
