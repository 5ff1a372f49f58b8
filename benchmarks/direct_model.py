"""A direct, vectorised cvxpy/Clarabel model of an invented large case: the baseline of
``bench_large.py`` (what a user could write by hand for the same problem).

Run:  python benchmarks/direct_model.py CASE.toml MODEL

Reads the case file with ``tomllib`` (no allocator import), builds one cvxpy problem with
vectorised costs (reciprocal, reciprocal-power and exponential curves, as
``large_case.py`` writes them) and one constraint block for all requirements, solves it
with Clarabel and prints ``{"cost": ..., "status": ...}`` as JSON. Models:

- worst-case: ``|A| diag(n) t ≤ min(ȳ − L, U − ȳ)`` (linear);
- rss: ``‖√n a f t‖₂ ≤ σ_max`` per requirement (one SOC block), ``σ_max`` of two-sided
  limits from the normal fallout by bisection;
- mean-shift (upper limits only): ``‖√n a f t‖₂ ≤ (U − ȳ − Σ n|a|m t)/z``,
  ``z = Φ⁻¹(1 − p)``: the allowed σ with the mean at its worst (exact for one limit).

Sensitivities are the chain coefficients (linear chains), σ/t = 1/3 (normal, cp = 1).
"""

from __future__ import annotations

import json
import math
import sys
import tomllib

import numpy as np


def _phi(x):
    return 0.5 * math.erfc(-x / math.sqrt(2.0))


def _z(p):
    lo, hi = 0.0, 40.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if 1.0 - _phi(mid) > p else (lo, mid)
    return 0.5 * (lo + hi)


def _sigma_max(mean, p, lower, upper):
    """Largest σ with Φ((L − μ)/σ) + Φ((μ − U)/σ) ≤ p (bisection)."""
    lo, hi = 0.0, max(upper - mean, mean - lower)
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        out = _phi((lower - mean) / mid) + _phi((mean - upper) / mid)
        lo, hi = (mid, hi) if out <= p else (lo, mid)
    return lo


def main(path, model):
    import cvxpy as cp
    import scipy.sparse as sp

    with open(path, "rb") as f:
        data = tomllib.load(f)
    people = data["contributor"]
    index = {c["name"]: i for i, c in enumerate(people)}
    n_parts = len(people)
    count = np.array([c.get("count", 1) for c in people], dtype=float)
    nominal = np.array([c["nominal"] for c in people])
    lo = np.array([c["limits"][0] for c in people])
    hi = np.array([c["limits"][1] for c in people])
    shift = np.array([c.get("mean_shift", 0.0) for c in people])
    rows, cols, vals = [], [], []
    for r, req in enumerate(data["requirement"]):
        for name, coef in req["chain"].items():
            rows.append(r)
            cols.append(index[name])
            vals.append(coef)
    m = len(data["requirement"])
    A = sp.csr_matrix((vals, (rows, cols)), shape=(m, n_parts))
    y0 = A @ (count * nominal)

    t = cp.Variable(n_parts)
    terms = []
    for kind in ("reciprocal", "reciprocal-power", "exponential"):
        idx = np.array([i for i, c in enumerate(people) if c["cost"]["curve"] == kind], dtype=int)
        if idx.size == 0:
            continue
        a = np.array([people[i]["cost"]["a"] for i in idx])
        b = np.array([people[i]["cost"]["b"] for i in idx])
        n = count[idx]
        terms.append(float(n @ a))
        if kind == "reciprocal":
            terms.append((n * b) @ cp.inv_pos(t[idx]))
        elif kind == "reciprocal-power":
            k = np.array([people[i]["cost"]["k"] for i in idx])
            for power in np.unique(k):
                sel = k == power
                terms.append((n * b)[sel] @ cp.power(t[idx[sel]], -float(power)))
        else:
            c = np.array([people[i]["cost"]["c"] for i in idx])
            terms.append((n * b) @ cp.exp(cp.multiply(-c, t[idx])))
    cons = [t >= lo, t <= hi]
    lower = np.array([req.get("lower", -np.inf) for req in data["requirement"]])
    upper = np.array([req.get("upper", np.inf) for req in data["requirement"]])
    p = np.array([req.get("fallout_ppm", 2700.0) * 1e-6 for req in data["requirement"]])
    if model == "worst-case":
        room = np.minimum(y0 - lower, upper - y0)
        cons.append(abs(A) @ sp.diags(count) @ t <= room)
    else:
        # one SOC per requirement over its chain members, stacked: rows of equal length
        W = (abs(A) @ sp.diags(np.sqrt(count) / 3.0)).tocsr()
        width = int(np.diff(W.indptr).max())
        sel_rows, sel_cols, sel_vals = [], [], []
        for r in range(m):
            start, end = W.indptr[r], W.indptr[r + 1]
            for j, k in enumerate(range(start, end)):
                sel_rows.append(r * width + j)
                sel_cols.append(W.indices[k])
                sel_vals.append(W.data[k])
        S = sp.csr_matrix((sel_vals, (sel_rows, sel_cols)), shape=(m * width, n_parts))
        spread = cp.reshape(S @ t, (m, width), order="C")
        if model == "rss":
            bound = np.array([_sigma_max(y0[r], p[r], lower[r], upper[r]) for r in range(m)])
        else:
            z = np.array([_z(q) for q in p])
            V = abs(A) @ sp.diags(count * shift)
            bound = cp.multiply(1.0 / z, (upper - y0) - V @ t)
        cons.append(cp.SOC(bound, spread, axis=1))
    problem = cp.Problem(cp.Minimize(cp.sum(cp.hstack([cp.sum(x) for x in terms]))), cons)
    problem.solve(solver="CLARABEL")  # its default tolerances (1e-8), as a user would
    print(json.dumps({"cost": float(problem.value), "status": problem.status}))


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2])
