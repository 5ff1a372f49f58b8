"""Random invented cost curves shared by the benchmark scripts (never real product data)."""

from allocator.model import CostCurve


def random_cost(rng) -> CostCurve:
    """A reciprocal, reciprocal-power or exponential curve with plausible parameters."""
    kind = rng.integers(3)
    if kind == 0:
        return CostCurve("reciprocal", a=rng.uniform(0.1, 2), b=rng.uniform(1e-3, 1e-2))
    if kind == 1:
        return CostCurve("reciprocal-power", a=rng.uniform(0.1, 2), b=rng.uniform(1e-5, 1e-3),
                         k=float(rng.choice([1.5, 2.0])))
    return CostCurve("exponential", a=rng.uniform(0.1, 1), b=rng.uniform(0.5, 3), c=rng.uniform(10, 60))
