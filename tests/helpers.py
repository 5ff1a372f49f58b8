"""Small builders for invented test cases (no file needed)."""

from __future__ import annotations

from allocator.model import AllocationSettings, Case, Contributor, CostCurve, Requirement


def reciprocal(a=0.0, b=0.01):
    return CostCurve(curve="reciprocal", a=a, b=b)


def contributor(name, nominal=10.0, tolerance=0.05, limits=(0.005, 0.2), **kw):
    kw.setdefault("cost", reciprocal())
    return Contributor(name=name, nominal=nominal, tolerance=tolerance, limits=limits, **kw)


def make_case(contributors, requirements, models=("worst-case", "rss"), **kw):
    return Case(
        title=kw.pop("title", "invented test case"),
        contributors=tuple(contributors),
        requirements=tuple(requirements),
        allocation=AllocationSettings(models=tuple(models)),
        **kw,
    )


def chain_requirement(name, chain, lower=None, upper=None, fallout_ppm=2700.0):
    return Requirement(name=name, chain=dict(chain), lower=lower, upper=upper, fallout_ppm=fallout_ppm)
