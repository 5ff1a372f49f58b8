"""An invented large case (many contributors, many requirements) as a case file.

Used by ``bench_large.py`` and ``bench_scale.py``; never real product data. Every
requirement is a chain of ``per_chain`` contributors drawn at random (each contributor in
``requirements·per_chain/contributors`` chains on average), coefficients ±(0.5…2), random
reciprocal / reciprocal-power / exponential costs (``invented.random_cost``). The limits
leave room for a fraction of what the loosest tolerances need under ``model``, so most
requirements bind; about one in ten is loose enough not to.

``sides="two"`` gives two-sided limits (nominal nearer the lower one); ``"upper"`` an upper
limit only (the mean-shift benchmark: there the allowed σ is linear in the mean shift, so a
direct conic model of the same problem is exact).
"""

from __future__ import annotations

import numpy as np

from invented import random_cost  # noqa: E402  (benchmarks/ is on sys.path when run as a script)


def large_case_text(contributors: int = 1000, requirements: int = 100, per_chain: int = 30,
                    model: str = "rss", sides: str = "two", seed: int = 17) -> str:
    """TOML text of the invented case (see the module docstring)."""
    rng = np.random.default_rng(seed)
    per_chain = min(per_chain, contributors)
    lines = [
        "# Invented benchmark case (random, fixed seed); not real product data.",
        f'title = "invented large case {contributors} x {requirements}"',
        'units = "mm"',
        "",
    ]
    lo = rng.uniform(0.002, 0.01, contributors)
    hi = lo * rng.uniform(5, 30, contributors)
    shift = rng.uniform(0.0, 0.3, contributors)
    count = rng.choice([1, 1, 1, 2], contributors)
    nominal = rng.uniform(1, 50, contributors)
    for i in range(contributors):
        cost = random_cost(rng)
        keys = {"reciprocal": "ab", "reciprocal-power": "abk", "exponential": "abc"}[cost.curve]
        params = ", ".join(f"{k} = {float(getattr(cost, k))!r}" for k in keys)
        lines += [
            "[[contributor]]",
            f'name = "x{i}"',
            f"nominal = {float(nominal[i])!r}",
            f"tolerance = {float(np.sqrt(lo[i] * hi[i]))!r}",
            f"limits = [{float(lo[i])!r}, {float(hi[i])!r}]",
            f"count = {int(count[i])}",
            f"mean_shift = {float(shift[i])!r}",
            f'cost = {{ curve = "{cost.curve}", {params} }}',
            "",
        ]
    for r in range(requirements):
        members = np.sort(rng.choice(contributors, size=per_chain, replace=False))
        a = rng.choice([-1.0, 1.0], per_chain) * rng.uniform(0.5, 2.0, per_chain)
        n, t_hi = count[members], hi[members]
        y0 = float(np.sum(a * n * nominal[members]))
        half = float(np.sum(n * np.abs(a) * t_hi))
        sigma = float(np.sqrt(np.sum(n * (a * t_hi / 3.0) ** 2)))
        delta = float(np.sum(n * np.abs(a) * shift[members] * t_hi))
        room = {"worst-case": 0.4 * half, "rss": 2.2 * sigma, "mean-shift": 2.2 * sigma + 0.6 * delta}[model]
        if rng.uniform() < 0.1:
            room *= 3.0  # loose: this one does not bind
        chain = ", ".join(f"x{i} = {float(c)!r}" for i, c in zip(members, a))
        lines += ["[[requirement]]", f'name = "r{r}"', f"chain = {{ {chain} }}"]
        if sides == "two":
            lines.append(f"lower = {y0 - 1.3 * room!r}")
        lines += [f"upper = {y0 + room!r}", "fallout_ppm = 100", ""]
    lines += ["[allocation]", f'models = ["{model}"]', ""]
    return "\n".join(lines)


def write_large_case(path, **options) -> None:
    """Write :func:`large_case_text` to ``path``."""
    with open(path, "w", encoding="utf-8") as f:
        f.write(large_case_text(**options))
