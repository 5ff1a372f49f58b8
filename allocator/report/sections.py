"""The report's sections as HTML, one function per numbered section, in order.

:func:`document` assembles the page: :func:`header` (the result that matters, problems,
a short caution, the contents), then :func:`summary` (1), :func:`analysis` (2),
:func:`allocation` (3), :func:`frontier` (4), :func:`contributions` (5),
:func:`verification` (6), :func:`shadow_prices` (7), :func:`supplier` (8),
:func:`cautions` (9) and :func:`reproducibility` (10); ids and headings are
:data:`.outline.SECTIONS`. Each function only formats results a :class:`.build.Report`
holds: no number is computed here, so the report and the library cannot disagree. The
stylesheet is the package file ``style.css``.

Sections are written as f-strings with the helpers of :mod:`.html` (why not templates:
see there). Every text from the case is escaped on its way in.
"""

from __future__ import annotations

import functools
import platform
import shlex
from importlib import resources
from pathlib import Path

from .. import status as _status
from ..costs import FAMILIES
from .html import (
    MODEL_LABELS,
    Row,
    Units,
    esc,
    facts_list,
    flag,
    fmt_input,
    fmt_number,
    given,
    model_name,
    num,
    ppm,
    resp,
    saving,
    table,
    tol,
    unit_suffix,
)
from .outline import SECTIONS, working_on

# what each stack model assumes, in words (section 1)
MODEL_EXPLANATIONS = {
    "worst-case": "every part at its tolerance limit at the same time; the requirement holds "
    "for every assembly whose parts are in tolerance",
    "rss": "parts vary independently with the stated distributions; the response is taken as "
    "normal with the root-sum-square σ, and its predicted fallout must meet the target",
    "mean-shift": "as RSS, but each process mean may sit anywhere within its stated mean shift; "
    "the fallout at the worst mean must meet the target (estimated mean shift, Greenwood & "
    "Chase 1987)",
    "convolution": "parts vary independently with the stated distributions (normal with its cp, "
    "uniform, triangular), and the exact fallout of the response, computed by numerical "
    "convolution with the mean at the worse end of any mean-shift band, must meet the target; "
    "the allocation is a verified first-order (KKT) optimum, not proven global",
}

# the cautions in full (section 9); the header repeats their gist next to the result
CAUTIONS = (
    "Statistical results (RSS, mean shift, fallout in ppm, the Monte Carlo verification) assume "
    "stable, capable processes whose means sit where the case says (centred unless a mean shift "
    "is given), whose spreads follow the stated distributions and cp, and whose parts vary "
    "independently. They are predictions, not measurements.",
    "Before relying on a statistical tolerance, confirm each process with measured capability "
    "data (Cp, Cpk from a stable run) and keep monitoring it in production; a drifting or "
    "incapable process invalidates the ppm figures.",
    "Requirements given as expressions (or through closure equations) are linearised at the "
    "nominals for RSS and allocation; the Monte Carlo section evaluates the exact expression "
    "(solving the closure for every assembly) and shows where that matters.",
    "Safety-critical fits, and anything whose failure can hurt people, must be designed worst "
    "case and checked against the applicable codes and standards, with review by a licensed or "
    "otherwise qualified engineer.",
    "Costs are the case's cost curves, not quotations. The supplier sheet shows what the model "
    "expects; a supplier's real price may differ.",
    "This report is a decision aid, not an approval.",
)


# --------------------------------------------------------------------------- the page


def document(report, figures: dict[str, str]) -> str:
    """The whole HTML page of ``report``; ``figures`` maps a section id to its inline SVG.

    Raises
    ------
    InternalError
        Formatting a section failed unexpectedly (names the section).
    """
    # looked up when called, so a test can replace one section's function
    writers = (
        ("summary", summary, ()),
        ("analysis", analysis, ()),
        ("allocation", allocation, ()),
        ("frontier", frontier, (figures.get("frontier"),)),
        ("contributions", contributions, (figures["contributions"],)),
        ("verification", verification, (figures["verification"],)),
        ("shadow-prices", shadow_prices, ()),
        ("supplier", supplier, ()),
        ("cautions", cautions, ()),
        ("reproducibility", reproducibility, ()),
    )
    with working_on(None):
        body = [header(report), "<main>"]
    for name, write, extra in writers:
        with working_on(name):
            body.append(write(report, *extra))
    body.append("</main>")
    title = f"Tolerance allocation report: {report.case.title}"
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f'<meta name="generator" content="allocator {esc(report.versions.get("allocator", ""))}">\n'
        f"<title>{esc(title)}</title>\n<style>\n{stylesheet()}</style>\n</head>\n<body>\n"
        + "\n".join(body)
        + "\n</body>\n</html>\n"
    )


@functools.cache
def stylesheet() -> str:
    """The report's CSS (package file ``style.css``): screen, A4 print, greyscale-safe."""
    return resources.files(__package__).joinpath("style.css").read_text(encoding="utf-8")


def section(sid: str, inner: str) -> str:
    """One numbered section: its heading from :data:`.outline.SECTIONS`, then ``inner`` (HTML)."""
    heading = dict(SECTIONS)[sid]
    return f'<section id="{sid}">\n<h2>{esc(heading)}</h2>\n{inner}\n</section>'


# --------------------------------------------------------------------------- header


def header(report) -> str:
    """The top of the page: title, problems, the result that matters, a short caution, contents."""
    case = report.case
    parts = [
        "<header>",
        '<p class="kicker">Tolerance allocation report</p>',
        f"<h1>{esc(case.title)}</h1>",
        '<p class="meta">'
        + " · ".join(
            esc(x)
            for x in (
                f"case file {Path(case.path).name}" if case.path else "case not read from a file",
                f"created {report.created:%Y-%m-%d %H:%M} UTC",
                f"allocator {report.versions.get('allocator', '')}",
            )
        )
        + "</p>",
    ]
    problems = report.problems
    if problems:
        parts.append(
            '<div class="alert" role="alert"><p><strong>Attention: '
            + esc(report.status.upper())
            + ".</strong> Not every result below is usable:</p><ul>"
            + "".join(f"<li>{esc(p)}</li>" for p in problems)
            + "</ul></div>"
        )
    parts.append(_verdict_line(report))
    parts.append(_caution_brief(case))
    parts.append(
        '<nav aria-label="Contents"><h2 class="toc">Contents</h2><ol>'
        + "".join(f'<li><a href="#{sid}">{esc(h.split(" ", 1)[1])}</a></li>' for sid, h in SECTIONS)
        + "</ol></nav>"
    )
    parts.append("</header>")
    return "\n".join(parts)


def _verdict_line(report) -> str:
    """The recommended allocation's cost against today's, its saving and the Monte Carlo verdict."""
    cur = report.case.currency
    rec = report.allocations.get(report.recommended)
    if rec is not None:
        if rec.savings is not None and rec.savings < 0:
            change = (f"it costs <strong>{num(-rec.savings)}</strong> more "
                      f"({num(-rec.savings_percent, 3) if rec.savings_percent is not None else '—'} %)")
        else:
            change = (f"saving <strong>{num(rec.savings, signed=True)}</strong> "
                      f"({num(rec.savings_percent, 3, signed=True)} %)")
        return (
            '<p class="verdict">Recommended here: the <strong>'
            + model_name(report.recommended)
            + f"</strong> allocation, <strong>{num(rec.total_cost)}</strong>{esc(' ' + cur if cur else '')} per assembly "
            f"against {num(rec.current_cost)} for the current design: {change}. "
            f"Monte Carlo: {esc(report.verification.message)}.</p>"
        )
    return '<p class="verdict">No model produced an allocation; sections 3 to 8 show the current design only.</p>'


def _caution_brief(case) -> str:
    """The short caution at the top; whether processes are taken as centred depends on the case."""
    means = (
        "whose means stay within the mean shifts the case states"
        if _has_mean_shifts(case)
        else "centred on their nominals (the case states no mean shift)"
    )
    return (
        '<aside class="caution-brief" role="note"><p><strong>Caution.</strong> Statistical results assume '
        f"stable, capable processes with the stated distributions, {means}: verify with measured capability "
        "before relying on them. Safety-critical fits are designed worst case and checked against the "
        'applicable codes and a licensed engineering review. <a href="#cautions">All cautions (section 9)</a>.</p></aside>'
    )


def _has_mean_shifts(case) -> bool:
    """True when some contributor of ``case`` states a mean shift."""
    return any(c.mean_shift > 0 for c in case.contributors)


# --------------------------------------------------------------------------- 1 Case summary and assumptions


def summary(report) -> str:
    """Section 1: the case as stated (facts, contributors, requirements), the models, the assumptions."""
    case = report.case
    models = "<ul>" + "".join(
        f"<li><strong>{model_name(m)}</strong>: {esc(MODEL_EXPLANATIONS.get(m, ''))}.</li>" for m in report.models
    ) + "</ul>"
    assumptions = (
        "<ul>"
        "<li>A tolerance ±t is a symmetric half-width about the nominal.</li>"
        "<li>σ of a contributor: t/(3·cp) for normal, t/√3 for uniform, t/√6 for triangular.</li>"
        "<li>Contributors vary independently; a contributor with count n stands for n independent parts.</li>"
        "<li>Unit costs follow the stated curves; an assembly costs Σ count · unit cost.</li>"
        "</ul>"
    )
    return section(
        "summary",
        _case_facts(report) + _contributors_table(case) + _requirements_table(case)
        + "<h3>Models</h3>" + models + "<h3>Assumptions</h3>" + assumptions,
    )


def _case_facts(report) -> str:
    """Title, units, currency, file, models, rounding and the economics the case states."""
    case = report.case
    u = case.units
    facts = [
        ("Title", esc(case.title)),
        ("Units", esc(u or "—") + _own_units_text(case)),
        ("Currency", esc(case.currency or "—")),
        ("Case file", esc(case.path) if case.path else "—"),
        ("Models in this report", ", ".join(model_name(m) for m in report.models)),
        ("Rounding of allocated tolerances", esc(case.allocation.rounding) if case.allocation.rounding is not None else "none"),
    ]
    if case.economics.volume is not None:
        facts.append(("Volume", f"{given(case.economics.volume)} assemblies per year"))
    if case.economics.scrap_cost is not None:
        facts.append(("Cost of one assembly out of limits", f"{given(case.economics.scrap_cost)}{esc(' ' + case.currency if case.currency else '')}"))
    return facts_list(facts)


def _own_units_text(case, limit: int = 12) -> str:
    """HTML list of the contributors and requirements whose units differ from the case's."""
    own = [(c.name, c.units) for c in case.contributors if c.units not in (None, case.units)]
    own += [(r.name, r.units) for r in case.requirements if r.units not in (None, case.units)]
    if not own:
        return ""
    shown = ", ".join(f"{esc(name)} [{esc(label)}]" for name, label in own[:limit])
    more = f" and {len(own) - limit} more" if len(own) > limit else ""
    return f'<div class="desc">in their own units: {shown}{more}</div>'


def _contributors_table(case) -> str:
    """Every contributor as the case states it: nominal, ±, range, distribution, cost curve."""
    rows = []
    cu = Units(case.contributor_units(c.name) for c in case.contributors)
    for c in case.contributors:
        label = case.contributor_units(c.name)
        if c.processes:
            limits = "by process"
            cost = "".join(
                f'<div class="proc"><strong>{esc(p.name)}</strong> '
                + cu.cell(f"±{given(p.limits[0])} to ±{given(p.limits[1])}", label)
                + (f", cp {given(p.cp)}" if p.cp is not None else "")
                + f": {_cost_text(p.cost)}</div>"
                for p in c.processes
            )
        elif c.fixed and c.limits is None:
            limits, cost = "held", _cost_text(c.cost)
        else:
            lo, hi = c.limits if c.limits is not None else (c.tolerance, c.tolerance)
            limits = cu.cell(f"{given(lo)} to {given(hi)}", label)
            cost = _cost_text(c.cost)
        name = esc(c.name) + (f'<div class="desc">{esc(c.description)}</div>' if c.description else "")
        if c.fixed:
            name += " " + flag("fixed")
        rows.append(
            [
                name,
                cu.cell(given(c.nominal), label),
                cu.cell(given(c.tolerance), label),
                limits,
                esc(c.distribution),
                given(c.cp) if c.distribution == "normal" else "—",
                given(c.mean_shift),
                str(c.count),
                cost,
            ]
        )
    return table(
        ["Contributor", cu.head("Nominal"), cu.head("Current ±"), cu.head("Achievable ±"), "Distribution",
         "cp", "Mean shift [×&nbsp;t]", "Count", f"Unit cost{unit_suffix(case.currency)} at ±t" + cu.head("")],
        rows,
        numeric=[False, True, True, True, False, True, True, True, False],
        caption="Contributors as stated in the case file",
    )


def _cost_text(curve) -> str:
    """The cost curve as HTML: its formula, then its parameters on a second line."""
    if curve is None:
        return "no cost (held)"
    if curve.curve not in FAMILIES:
        return esc(curve.curve)
    formula, params = FAMILIES[curve.curve].describe(curve, fmt_input)
    return f'<span class="nw">{esc(formula)}</span><div class="desc">{esc(params)}</div>'


def _requirements_table(case) -> str:
    """Every requirement: its response, limits and fallout target."""
    ru = Units(case.requirement_units(r.name) for r in case.requirements)
    req_rows = [
        [esc(r.name), _chain_text(r), ru.cell(given(r.lower), case.requirement_units(r.name)),
         ru.cell(given(r.upper), case.requirement_units(r.name)), ppm(r.target_ppm)]
        for r in case.requirements
    ]
    return table(
        ["Requirement", "Response y", ru.head("Lower limit"), ru.head("Upper limit"), "Fallout target [ppm]"],
        req_rows,
        numeric=[False, False, True, True, True],
        caption="Requirements (the fallout target applies to the statistical models)",
    )


def _chain_text(requirement) -> str:
    """The response of a requirement as written: its chain as a signed sum, or its expression."""
    if requirement.chain is None:
        return f"<code>{esc(requirement.expression)}</code>"
    terms = []
    for name, coeff in requirement.chain.items():
        sign = "−" if coeff < 0 else "+"
        mag = abs(coeff)
        factor = "" if mag == 1 else f"{fmt_input(mag)}·"
        terms.append(f"{sign} {factor}{name}")
    text = " ".join(terms)
    text = text[2:] if text.startswith("+ ") else text
    return f"<code>{esc(text)}</code>"


# --------------------------------------------------------------------------- 2 Stack analysis of the current design


def analysis(report) -> str:
    """Section 2: the current design's stack results, and each requirement's contributors."""
    intro = (
        "<p>The design as it is today: every contributor at its current tolerance. "
        "Computed by <code>allocator.analysis.analyze</code>.</p>"
    )
    results = _analysis_table(report.analysis, "Stack results at the current tolerances")
    parts = [intro, _unknowns_table(report.analysis), results]
    for r in report.analysis.requirements:
        per = Units(c.sensitivity_units for c in r.contributions)
        tol_units = Units(c.units for c in r.contributions)
        rows = [
            [esc(c.name), per.cell(num(c.sensitivity), c.sensitivity_units), str(c.count),
             tol_units.cell(given(c.tolerance), c.units), num(c.worst_case), num(100 * c.variance_share, 3)]
            for c in r.contributions
        ]
        headers = ["Contributor", per.head("Sensitivity ∂y/∂x"), "Count", tol_units.head("±t"),
                   f"± worst-case share{unit_suffix(r.units)}", "Share of σ² [%]"]
        numeric = [False, True, True, True, True, True]
        caption = f"Contributors to {esc(r.name)}"
        if r.through_loop:  # the sensitivity split: unknowns held + through the closure loop
            for row, c in zip(rows, r.contributions):
                row[2:2] = [num(c.direct_sensitivity), num(c.loop_sensitivity)]
            headers[2:2] = ["Direct ∂f/∂x", "Through the loop ∂f/∂u·du/dx"]
            numeric[2:2] = [True, True]
            caption += f" (through the closure loop: {esc(', '.join(r.through_loop))})"
        parts.append(table(headers, rows, numeric=numeric, caption=caption))
    return section("analysis", "\n".join(p for p in parts if p))


def _unknowns_table(result) -> str:
    """The closure unknowns at the nominal solution; empty when the case has none."""
    if not result.unknowns:
        return ""
    rows = [[esc(u.name), num(u.nominal, 9), esc(u.description)] for u in result.unknowns]
    return table(
        ["Unknown", "Nominal value", "Description"],
        rows,
        numeric=[False, True, False],
        caption="Closure equations solved at the nominals (Newton; sensitivities by the implicit function theorem)",
    )


def _analysis_table(result, caption: str) -> str:
    """Quantities down, requirements across: one stack analysis (:class:`StackAnalysis`)."""
    reqs = result.requirements
    headers = ["Quantity"] + [esc(r.name) for r in reqs]
    ru = Units(r.units for r in reqs)

    def row(label, values):
        return [label] + values

    def measured(label, values):
        """A row in the requirements' units: in the label when shared, else after each value."""
        return [ru.head(label)] + [ru.cell(v, r.units) for v, r in zip(values, reqs)]

    rows = [
        measured("Nominal response ȳ", [resp(r.nominal) for r in reqs]),
        measured("Limits", [f"{given(r.lower)} to {given(r.upper)}" for r in reqs]),
        measured("Worst case, lowest", [resp(r.worst_case_min) for r in reqs]),
        measured("Worst case, highest", [resp(r.worst_case_max) for r in reqs]),
        row("Worst case within limits", [_worst_case_flag(r) for r in reqs]),
        measured("RSS σ", [num(r.sigma) for r in reqs]),
        row("Cpk of the response", [num(r.cpk, 3) for r in reqs]),
        row("Predicted fallout, RSS [ppm]", [ppm(r.rss_ppm) for r in reqs]),
        row("  of which below / above [ppm]", [f"{ppm(r.fallout_below_ppm)} / {ppm(r.fallout_above_ppm)}" for r in reqs]),
        measured("Mean-shift band ±δ", [num(r.mean_shift) for r in reqs]),
        row("Predicted fallout, mean at worst place [ppm]", [ppm(r.mean_shift_ppm) for r in reqs]),
        row("Exact fallout, stated distributions, worst mean [ppm]",
            ["n/a (expression)" if r.convolution_ppm is None else ppm(r.convolution_ppm) for r in reqs]),
        row("Fallout target [ppm]", [ppm(r.target_ppm) for r in reqs]),
        row("Meets target (RSS)", [flag("yes") if r.rss_ppm <= r.target_ppm else flag("NO", "bad") for r in reqs]),
        row("Response", [_response_kind(r) for r in reqs]),
    ]
    return table(headers, rows, numeric=[False] + [True] * len(reqs), caption=caption, cls="metrics")


def _response_kind(r) -> str:
    if r.linear:
        return "linear chain"
    if r.through_loop:
        return f"through the closure loop ({esc(', '.join(r.through_loop))}), linearised"
    return "expression, linearised"


def _worst_case_flag(r) -> str:
    """'yes', or 'NO' with the amount past each limit (as judged by the analysis)."""
    if r.worst_case_ok:
        return flag("yes")
    misses = [
        f"{num(amount, 3)} {side}"
        for amount, side in ((r.worst_case_below, "below lower"), (r.worst_case_above, "above upper"))
        if amount
    ]
    return flag("NO", "bad") + " " + ", ".join(misses)


# --------------------------------------------------------------------------- 3 Allocation by model


def allocation(report) -> str:
    """Section 3: the least-cost tolerances side by side, their cost, and each requirement at each."""
    failures = "".join(
        f'<div class="alert"><p><strong>{model_name(m)}: {esc(a.status.upper())}.</strong> {esc(a.message)}</p></div>'
        for m, a in report.allocations.items()
        if not a.success
    )
    rec_note = (
        f"<p>The report recommends the <strong>{model_name(report.recommended)}</strong> allocation: the most "
        "conservative statistical model that found an optimum (mean shift before RSS; worst case when no "
        "statistical model was requested). This is the report's default, not an engineering judgement; "
        "choose the model that fits the product and its risks.</p>"
        if report.recommended
        else ""
    )
    legend = (
        '<p class="note">Tags: <span class="tag">tightest</span> the tolerance sits at its tightest achievable value '
        '(the cost curve ends there); <span class="tag">loosest</span> at its loosest; <span class="tag">fixed</span> held '
        "by the case. Under a value: the process chosen, when there is a choice, and the ISO 286 grade when the "
        "case rounds to grades. Computed by "
        "<code>allocator.solve.allocate</code>; every optimum is re-checked against every requirement.</p>"
    )
    return section(
        "allocation",
        failures + rec_note + _tolerances_table(report) + legend + _requirements_at_allocations(report),
    )


def _tolerances_table(report) -> str:
    """Contributors down, models across; the cost, saving and status rows underneath."""
    case = report.case
    allocs = report.allocations
    models = list(allocs)
    cu = Units(case.contributor_units(c.name) for c in case.contributors)
    headers = ["Contributor", cu.head("Current ±")] + [
        cu.head(f"{model_name(m)} ±") + (" (recommended)" if m == report.recommended else "") for m in models
    ]
    rows = []
    for c in case.contributors:
        label = case.contributor_units(c.name)
        cells = [esc(c.name), cu.cell(given(c.tolerance), label)]
        for m in models:
            a = allocs[m]
            if not a.success:
                cells.append("—")
                continue
            cells.append(cu.cell(tol(a.tolerances[c.name]), label) + _bound_note(str(a.active[c.name]))
                         + _process_and_grade(a, c.name))
        rows.append(cells)
    rows += _cost_rows(case.currency, allocs)
    return table(headers, rows, numeric=[False] + [True] * (1 + len(models)),
                 caption="Least-cost ± tolerances per stack model (side by side)", cls="alloc")


def _bound_note(bound: str) -> str:
    """A tag when an allocated tolerance sits at a bound of its range (or is held)."""
    return {"tightest": " " + flag("tightest"), "loosest": " " + flag("loosest"), "fixed": " " + flag("fixed"),
            "held": " " + flag("held")}.get(bound, "")


def _process_and_grade(result, name: str) -> str:
    """The process chosen and the ISO 286 grade of one contributor, under its value (HTML)."""
    under = [result.processes.get(name, ""), (getattr(result, "grades", None) or {}).get(name, "")]
    under = " · ".join(x for x in under if x)
    return f'<div class="desc">{esc(under)}</div>' if under else ""


def _cost_rows(currency, allocs) -> list:
    """The rows under the tolerances: cost per assembly, saving, cost of rounding, status."""
    models = list(allocs)
    cost_label = f"{unit_suffix(currency)}" if currency else ""
    first = next(iter(allocs.values()), None)
    current_cost = num(first.current_cost) if first is not None else "—"
    ok = {m: allocs[m].success for m in models}
    rows = [
        Row(["Cost per assembly" + cost_label, current_cost]
            + [num(allocs[m].total_cost) if ok[m] else "—" for m in models], "sum first"),
        Row(["Saving against current" + cost_label, ""]
            + [saving(allocs[m].savings) if ok[m] else "—" for m in models], "sum"),
        Row(["Saving against current [%]", ""]
            + [saving(allocs[m].savings_percent, 3, percent=True) if ok[m] else "—" for m in models], "sum"),
    ]
    # rounded allocations (case [allocation].rounding) say what the rounding cost
    rounding_cost = {m: getattr(allocs[m], "rounding_cost", None) for m in models}
    if any(v is not None for v in rounding_cost.values()):
        rows.append(Row([f"Cost of rounding the tolerances{cost_label}", ""]
                        + [num(rounding_cost[m], signed=True) if ok[m] else "—" for m in models], "sum"))
    rows.append(Row(["Status", ""] + [flag(allocs[m].status, "" if ok[m] else "bad") for m in models], "sum"))
    return rows


def _requirements_at_allocations(report) -> str:
    """The predicted result of each requirement at each model's allocation."""
    case = report.case
    req_rows = []
    ru = Units(case.requirement_units(r.name) for r in case.requirements)
    for r_i, req in enumerate(case.requirements):
        label = case.requirement_units(req.name)
        for m, a in report.allocations.items():
            if not a.success:
                req_rows.append([esc(req.name), model_name(m), "—", "—", "—", "—", "—"])
                continue
            rr = a.requirements[r_i]
            req_rows.append(
                [
                    esc(rr.name),
                    model_name(m),
                    ru.cell(f"{resp(rr.worst_case_min)} to {resp(rr.worst_case_max)}", label),
                    ru.cell(num(rr.sigma), label),
                    ppm(rr.fallout_ppm),
                    ppm(rr.target_ppm),
                    esc(rr.binding or "—"),
                ]
            )
    return table(
        ["Requirement", "Model", ru.head("Worst-case range"), ru.head("RSS σ"), "Predicted fallout [ppm]",
         "Target [ppm]", "Limit pressed"],
        req_rows,
        numeric=[False, False, True, True, True, True, False],
        caption="Each requirement at each allocation",
    )


# --------------------------------------------------------------------------- 4 Cost frontier


def frontier(report, svg: str | None) -> str:
    """Section 4: least cost against the swept limit or target (``svg``: the plot, None without one)."""
    front = report.frontier
    if front is None or svg is None:
        return section("frontier", f'<p class="note">No cost frontier: {esc(report.frontier_message)}.</p>')
    case = report.case
    cur = case.currency
    swept = "fallout target [ppm]" if front.vary == "fallout_ppm" else f"{front.vary} limit{unit_suffix(front.units)}"
    intro = (
        f"<p>The least cost per assembly of each model as the {esc(swept.split(' [')[0])} of "
        f"<strong>{esc(front.requirement)}</strong> moves from {esc(fmt_number(front.values[0], 6, strip=True))} to "
        f"{esc(fmt_number(front.values[-1], 6, strip=True))} "
        f"({len(front.values)} points; every point a complete allocation, every other limit as in the case). "
        "Computed by <code>allocator.sweep.frontier</code>, drawn by <code>allocator.plots.frontier_figure</code>."
        "</p>"
    )
    guide = (
        "<p><strong>How to read it.</strong> Each point is a complete least-cost allocation for one value of the "
        "swept limit or target; a line joins one model's points, told apart by dash pattern and marker. Moving "
        "along the axis towards a looser requirement the cost can only fall. Where a curve is steep, relaxing the "
        "requirement a little buys a lot (ask whether the limit is really needed there); where it is flat, "
        "relaxing buys nothing. The vertical gap between two models at the same value is the price of the more "
        "conservative model. The star is the current design at the case's own value; shaded spans are values "
        "that no model (or only some models) can meet.</p>"
    )
    status = ""
    if front.status != "optimal" or front.notes:
        lines = ([front.message] if front.message else []) + list(front.notes)
        status = '<p class="note">' + "<br>".join(esc(x) for x in lines) + "</p>"
    current = front.current or {}
    facts = []
    if current.get("value") is not None:
        value_units = "ppm" if front.vary == "fallout_ppm" else front.units
        facts.append(("Case value of the swept quantity", given(current["value"]) + (f"&nbsp;{esc(value_units)}" if value_units else "")))
    if current.get("total_cost") is not None:
        facts.append((f"Cost of the current design{unit_suffix(cur)}", num(current["total_cost"])))
    for model, cost in (current.get("optimal") or {}).items():
        facts.append((f"Least cost at the case value, {model_name(model)}{unit_suffix(cur)}", num(cost)))
    rows = [
        [ppm(v) if front.vary == "fallout_ppm" else esc(fmt_number(v, strip=True))] + [num(front.costs[m][i]) if front.costs[m][i] is not None else esc(front.statuses[m][i]) for m in front.models]
        for i, v in enumerate(front.values)
    ]
    results = table(
        [esc(swept[0].upper() + swept[1:])] + [f"{model_name(m)}{unit_suffix(cur)}" for m in front.models],
        rows,
        numeric=[True] * (1 + len(front.models)),
        caption="The frontier's points: least cost per assembly",
        cls="compact",
    )
    figure = f'<figure class="plot">{svg}<figcaption>Least cost per assembly against the swept value, per model.</figcaption></figure>'
    return section("frontier", intro + figure + guide + status + (facts_list(facts) if facts else "") + results)


# --------------------------------------------------------------------------- 5 Contributions to variation


def contributions(report, svg: str) -> str:
    """Section 5: each contributor's share of σ², today and at the recommended allocation."""
    text = (
        "<p>Share of the response variance σ² that each contributor causes (count · (∂y/∂x · σ)² over the total), "
        "from <code>allocator.analysis.analyze</code> at the current tolerances"
        + (f" and at the {model_name(report.recommended)} allocation" if report.recommended else "")
        + ". A long bar is where a tighter tolerance narrows the stack most; a short one is a part whose "
        "tolerance hardly matters to this requirement.</p>"
    )
    legend = "Dark solid bars: current design." + (
        f" White hatched bars: {esc(MODEL_LABELS.get(report.recommended))} allocation." if report.recommended else ""
    )
    return section("contributions", text + f'<figure class="plot">{svg}<figcaption>{legend}</figcaption></figure>')


# --------------------------------------------------------------------------- 6 Monte Carlo verification


def verification(report, svg: str) -> str:
    """Section 6: simulated fallout against the target and the predictions, with the histogram."""
    v = report.verification
    case = report.case
    ru = Units(c.units for c in v.requirements)
    basis = (
        f"the recommended {model_name(report.recommended)} allocation"
        if report.verification_basis == "allocation"
        else "the current design (no allocation was available)"
    )
    intro = (
        f"<p>{v.samples:,} whole assemblies drawn at random for {basis}, every part from its stated distribution"
        + (
            ", process means placed at the worst end of their mean shift"
            if v.shift_means and any(c.mean_shift > 0 for c in case.contributors)
            else ""
        )
        + f"; seed {v.seed}. Computed by <code>allocator.simulate.verify</code>; the interval is the exact "
        f"(Clopper–Pearson) {v.confidence:.0%} interval. Result: {esc(v.message)}.</p>"
    )
    if v.assumption_note:
        intro += f'<p class="note"><strong>Note:</strong> {esc(v.assumption_note)}.</p>'
    rows = [
        [
            esc(c.name),
            ppm(c.fallout_ppm),
            f"{ppm(c.ci_low_ppm)} to {ppm(c.ci_high_ppm)}",
            ppm(c.target_ppm),
            ppm(c.predicted_ppm),
            ppm(c.convolution_ppm),
            ru.cell(resp(c.mean), c.units),
            ru.cell(num(c.std), c.units),
            _verdict(c),
        ]
        for c in v.requirements
    ]
    results = table(
        ["Requirement", "Fallout, simulated [ppm]", f"{v.confidence:.0%} interval [ppm]", "Target [ppm]",
         "Analytic prediction [ppm]", "Exact convolution [ppm]", ru.head("Mean"), ru.head("Std. dev."), "Verdict"],
        rows,
        numeric=[False, True, True, True, True, True, True, True, False],
        caption="Simulated fallout against the target and the predictions",
    )
    note = (
        '<p class="note">Verdict: <span class="tag">pass</span> when the whole interval lies at or below the target; '
        '<span class="tag bad">fail</span> when it lies above; <span class="tag">undecided</span> when the target lies '
        "inside the interval (more samples would decide; nothing is shown to fail).</p>"
    )
    loops = [c for c in v.requirements if c.through_loop]
    if loops:
        counts = "; ".join(f"{esc(c.name)}: {c.not_closed:,}" for c in loops)
        note += (
            '<p class="note">Responses through the closure equations were solved for every simulated '
            "assembly (Newton from the nominal solution). Assemblies whose loop cannot close (no "
            f"solution near the nominal one) are counted as failures: {counts}.</p>"
        )
    figure = f'<figure class="plot">{svg}<figcaption>Histogram of the simulated response with the limits (dashed) and the RSS normal curve (<code>allocator.simulate.render_verification_plot</code>).</figcaption></figure>'
    return section("verification", intro + results + note + figure)


def _verdict(check) -> str:
    """pass, fail or undecided for one requirement's Monte Carlo check."""
    if check.status == "fail":
        return flag("fail", "bad")
    return flag("pass") if check.decided else flag("undecided")


# --------------------------------------------------------------------------- 7 Shadow prices


def shadow_prices(report) -> str:
    """Section 7: what each requirement limit is worth at the margin, and how to read it."""
    guide = (
        "<p><strong>How to read it.</strong> A shadow price is the change of the least cost per assembly when a "
        "limit moves by one unit, all else re-optimised; it holds for small moves. A negative value on an upper "
        "limit means raising that limit saves money; a positive value on a lower limit means lowering it saves "
        "money. The per-ppm column says what accepting one more ppm of fallout would save (statistical models). "
        "A zero or empty entry is a limit that does not constrain the optimum. Multiply by the change you have in "
        "mind (e.g. 0.01 of the unit) for a first estimate; the frontier shows larger moves exactly. "
        "Computed by <code>allocator.solve.allocate</code> together with each allocation.</p>"
    )
    if report.unrounded:
        guide += (
            '<p class="note">Marked <em>(unrounded)</em>: the allocation in section 3 is rounded to '
            f"{esc(report.case.allocation.rounding)}, so its cost moves in steps and has no derivative. These shadow "
            "prices belong to the same model solved without rounding (<code>allocate</code> on the case with "
            "<code>rounding</code> removed): what the limits are worth at the margin before rounding.</p>"
        )
    undefined = [
        m for m, a in report.allocations.items()
        if a.success and m not in report.unrounded and not has_shadow_prices(a)
    ]
    if undefined:
        guide += (
            '<p class="note">No shadow prices for the '
            + ", ".join(model_name(m) for m in undefined)
            + " allocation: its tolerances are a choice among listed, process or rounded values, where the cost "
            "moves in steps and has no derivative. The cost frontier (section 4) shows what a limit is worth there.</p>"
        )
    return section("shadow-prices", _shadow_price_table(report) + guide)


def _shadow_price_table(report) -> str:
    """Per requirement and model: the cost change per unit of each limit and per ppm of target."""
    from ..model import per_unit

    case = report.case
    cur = case.currency
    per_ppm = f"[{esc(cur or 'cost')}/ppm]"

    def per_limit(name: str) -> str:
        return per_unit(cur or "cost", case.requirement_units(name) or "unit")

    pu = Units(per_limit(r.name) for r in case.requirements)
    rows = []
    for m, a in report.allocations.items():
        if not a.success:
            rows.append(["—", model_name(m), esc(a.status), "—", "—", "—"])
            continue
        source = report.unrounded.get(m, a)
        for rr in source.requirements:
            rows.append(
                [
                    esc(rr.name),
                    model_name(m) + (" <small>(unrounded)</small>" if m in report.unrounded else ""),
                    esc(rr.binding or "—"),
                    pu.cell(num(rr.shadow_lower, signed=True), per_limit(rr.name)),
                    pu.cell(num(rr.shadow_upper, signed=True), per_limit(rr.name)),
                    num(rr.shadow_ppm, signed=True),
                ]
            )
    return table(
        ["Requirement", "Model", "Limit pressed", pu.head("Cost change per unit of lower limit"),
         pu.head("Cost change per unit of upper limit"), f"Cost change per ppm of target {per_ppm}"],
        rows,
        numeric=[False, False, False, True, True, True],
        caption="Marginal cost of each requirement limit (from the allocation's Lagrange multipliers)",
    )


def has_shadow_prices(result) -> bool:
    """True when some requirement of the allocation ``result`` has a shadow price on a limit."""
    return any(rr.shadow_lower is not None or rr.shadow_upper is not None for rr in result.requirements)


# --------------------------------------------------------------------------- 8 Supplier sheet


def supplier(report) -> str:
    """Section 8: the tolerance to ask of each supplier, and what one step looser costs elsewhere."""
    if report.recommended is None:
        return section("supplier", '<p class="note">No allocation is available, so there is nothing to ask suppliers for yet.</p>'
                       + _offers_part(report))
    sheet = report.supplier
    parts = [_ask_table(report)]
    if sheet is not None and sheet.rows:
        parts.append(_concession_table(report))
    elif sheet is not None:
        parts.append(f'<p class="note">{esc(sheet.message)}</p>')
    step = sheet.step if sheet is not None else 0.1
    guide = (
        "<p><strong>How to read it.</strong> The first table is the tolerance to put on each drawing or purchase "
        "order, per model, and what the case's cost curve says one part costs there. The second answers the "
        "question a supplier asks: <em>what if I can only hold a little less?</em> For each contributor the "
        f"allocation is solved again with that contributor held one step looser (+{step:.0%}, rounded up to the "
        "case's rounding step; for listed tolerances, the next listed value) and everything else free. "
        "<em>Change on this part</em> is what the supplier's part gets cheaper (count · unit-cost change, usually "
        "negative); <em>change elsewhere</em> is what the other parts cost more because their tolerances must "
        "tighten; <em>change of total</em> is the sum, the net price of the concession per assembly. It is never "
        "negative, because the allocation already was the least cost; a small total means the concession is "
        "nearly free, a large one means the supplier's price must drop at least that much to be worth it. "
        "Computed by <code>allocator.supplier.supplier_sheet</code>.</p>"
    )
    parts.append(guide)
    parts.append(_offers_part(report))
    return section("supplier", "\n".join(parts))


def _ask_table(report) -> str:
    """Per contributor: current ±, the ± each model asks for, the unit cost at the recommended one."""
    case = report.case
    cu = Units(case.contributor_units(c.name) for c in case.contributors)
    allocs = report.allocations
    ok_models = [m for m, a in allocs.items() if a.success]
    rec = report.recommended
    money = unit_suffix(case.currency)
    ask_headers = ["Contributor", "Count", cu.head("Current ±")] + [
        cu.head("Ask ±") + f", {model_name(m)}" + (" (recommended)" if m == rec else "") for m in ok_models
    ] + [f"Unit cost at the recommended ±{money}"]
    ask_rows = []
    for c in case.contributors:
        label = case.contributor_units(c.name)
        row = [esc(c.name) + (f'<div class="desc">{esc(c.description)}</div>' if c.description else ""), str(c.count),
               cu.cell(given(c.tolerance), label)]
        for m in ok_models:
            row.append(cu.cell(tol(allocs[m].tolerances[c.name]), label) + _process_and_grade(allocs[m], c.name))
        row.append(num(allocs[rec].unit_cost[c.name]))
        ask_rows.append(row)
    return table(ask_headers, ask_rows, numeric=[False] + [True] * (len(ask_headers) - 1),
                 caption="Tolerance to ask of each supplier")


def _concession_table(report) -> str:
    """Per contributor held one step looser: the change on its part, elsewhere and in total."""
    case = report.case
    cu = Units(case.contributor_units(c.name) for c in case.contributors)
    money = unit_suffix(case.currency)
    rows = []
    for r in report.supplier.rows:
        tightened = "<br>".join(
            f'<span class="nw">{esc(name)} {tol(before)} → '
            f'{cu.cell(tol(after), case.contributor_units(name))}</span>'
            for name, before, after in r.tightened
        ) or ("none" if r.status == _status.OPTIMAL else "")
        status = "" if r.status == _status.OPTIMAL else flag(r.status, "bad" if r.status in ("infeasible", "failed") else "")
        rows.append(
            [
                esc(r.contributor),
                cu.cell(tol(r.tolerance), r.units),
                num(r.unit_cost),
                (cu.cell(tol(r.looser), r.units) if r.looser is not None else "—") + (" " + status if status else ""),
                num(r.own_change, signed=True),
                num(r.elsewhere_change, signed=True),
                num(r.total_cost_change, signed=True),
                tightened if r.status == _status.OPTIMAL else esc(r.message),
            ]
        )
    return table(
        ["Contributor", cu.head("Asked ±"), f"Unit cost{money}", cu.head("One step looser ±"),
         f"Change on this part{money}", f"Change elsewhere{money}", f"Change of total{money}",
         cu.head("Other tolerances that must tighten")],
        rows,
        numeric=[False, True, True, True, True, True, True, False],
        caption=f"What loosening one tolerance by one step costs elsewhere ({model_name(report.recommended)} allocation)",
        cls="supplier",
    )


def _offers_part(report) -> str:
    """"Offers under discussion": per offer and model the cost with it, the saving, the
    break-even price and the counter-offer ("" when the report has no offers)."""
    evaluation = report.offers
    if evaluation is None:
        return ""
    case = report.case
    money = unit_suffix(case.currency)
    volume = case.economics.volume
    cu = Units(r.units for r in evaluation.rows)
    rows = []
    for r in evaluation.rows:
        if r.together:
            what = "All together: " + ", ".join(
                f'<span class="nw">{esc(o.contributor)} ±{tol(o.tolerance)} at {given(o.price)}</span>'
                for o in r.offers)
        else:
            what = (f"{esc(r.contributor)} ±{cu.cell(tol(r.tolerance), r.units)} at {given(r.price)}"
                    + (f" ×&nbsp;{r.count}" if r.count and r.count > 1 else "")
                    + (f'<div class="desc">{esc(r.note)}</div>' if r.note else ""))
        status = "" if r.success else " " + flag(r.status, "bad")
        if r.together:
            counter = "—"
        elif r.counter_tolerance is not None:
            counter = cu.cell(tol(r.counter_tolerance), r.units) + (
                f'<div class="desc">{esc(r.counter_note)}</div>' if r.counter_note else "")
        else:
            counter = f'none<div class="desc">{esc(r.counter_note)}</div>'
        cells = [what, model_name(r.model) + status, num(r.total_cost, 6), num(r.baseline_cost, 6),
                 saving(r.saving)]
        if volume:
            cells.append(saving(None if r.saving is None else r.saving * volume))
        cells += [num(r.break_even_price), num(r.curve_unit_cost), counter]
        rows.append(cells)
    headers = ["Offer (± at price per part)", "Model", f"With the offer{money}", f"Without{money}",
               f"Saving per assembly{money}"]
    if volume:
        headers.append(f"Saving per year{money}")
    headers += [f"Break-even price{money}", f"Own curve at the offered ±{money}", cu.head("Counter-offer ±")]
    numeric = [False, False] + [True] * (len(headers) - 3) + [False]
    parts = ['<h3 id="offers">Offers under discussion</h3>',
             table(headers, rows, numeric=numeric, caption="What each offer saves, and where it breaks even",
                   cls="supplier")]
    problems = [f"{esc(r.contributor)} ({model_name(r.model)}): {esc(r.message)}" for r in evaluation.rows
                if not r.success]
    if problems:
        parts.append('<ul class="note">' + "".join(f"<li>{p}</li>" for p in problems) + "</ul>")
    parts.append(
        "<p><strong>How to read it.</strong> For each offer the allocation is solved again with the offered part "
        "held at the offered tolerance and paid at the offered price (every instance pays it), every other "
        "tolerance free. <em>Without</em> is the least cost with no offer; the <em>saving</em> is the difference. "
        "Each unit the price rises takes one unit per instance off the saving, so the saving is zero at the "
        "<em>break-even price</em>: an offer below it saves, one above it costs. The <em>counter-offer</em> is the tolerance at "
        "which the case's own cost curve for the part costs the offered price: at that price, this is the "
        "tolerance to ask for. Several offers are also solved all at once, since their savings do not simply "
        "add up. The prices are the supplier's; everything else is the case's cost curves. "
        "Computed by <code>allocator.offers.evaluate_offers</code>.</p>"
    )
    return "\n".join(parts)


# --------------------------------------------------------------------------- 9 Cautions


def cautions(report) -> str:
    """Section 9: the full list of :data:`CAUTIONS`."""
    items = "".join(f"<li>{esc(text)}</li>" for text in CAUTIONS)
    return section("cautions", f'<div class="cautions"><ul>{items}</ul></div>')


# --------------------------------------------------------------------------- 10 Reproducibility


def reproducibility(report) -> str:
    """Section 10: versions, seed, case checksum, solvers, and the command that makes the same report."""
    case = report.case
    v = report.versions
    solver_rows = [
        [model_name(m), esc(a.status), esc(a.solver), str(a.iterations), num(a.gap) if a.gap is not None else "—", esc(a.message)]
        for m, a in report.allocations.items()
    ]
    solvers = table(["Model", "Status", "Solver", "Iterations", "Relative gap", "Solver message"], solver_rows,
                     numeric=[False, False, False, True, True, False], caption="Solvers")
    model_flags = " ".join(f"--model {m}" for m in report.models)
    frontier_flag = (
        " --no-frontier"
        if not report.include_frontier
        else (f" --frontier-points {report.frontier_points}" if report.frontier_points is not None else "")
    )
    # the case path exactly as it was given (folder included), quoted for a shell
    offer_flags = ""
    if report.offers is not None and tuple(report.offers.offers) != tuple(case.offers):
        offer_flags = "".join(f" --offer {shlex.quote(o.label)}" for o in report.offers.offers)
    command = (
        f"allocator report {shlex.quote(str(case.path)) if case.path else 'CASE'} {model_flags} "
        f"--samples {report.samples} --seed {report.seed}{frontier_flag}{offer_flags} -o REPORT.html"
    )
    facts = [
        ("Tool", f"allocator {esc(v.get('allocator', ''))}"),
        ("Case file", esc(case.path) if case.path else "not read from a file"),
        ("Case file SHA-256", f"<code>{esc(case.sha256 or '—')}</code>"),
        ("Monte Carlo", f"{report.samples:,} assemblies, seed {report.seed}"),
        ("Created", f"{report.created:%Y-%m-%d %H:%M:%S} UTC"),
        ("Python and libraries", esc(", ".join(f"{k} {version}" for k, version in v.items() if k != "allocator"))),
        ("Platform", esc(platform.platform(terse=True))),
        ("Same report again", f"<code>{esc(command)}</code>"),
    ]
    return section("reproducibility", facts_list(facts) + solvers)
