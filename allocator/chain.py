"""Requirement responses: safe expression parsing, exact evaluation and sensitivities.

A requirement is either a linear ``chain`` (``y = Σ coeff · x``) or an ``expression``, a
smooth function of contributor names written with numbers, ``+ - * / **``, parentheses and
the functions ``sqrt exp log sin cos tan asin acos atan atan2`` and the constant ``pi``.
Expressions are parsed with :mod:`ast` and checked against that whitelist; nothing is ever
passed to ``eval``. The checked tree is turned into a tree of numpy closures that evaluate
the response exactly (for Monte Carlo) and, fed complex numbers, give exact first
derivatives by the complex-step method (no subtraction, so no cancellation error).

In a requirement, a contributor's name stands for the sum of its ``count`` instances:
the value at nominal is ``count · nominal``.
"""

from __future__ import annotations

import ast
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Callable, Iterable, Mapping

import numpy as np

from .errors import did_you_mean

if TYPE_CHECKING:  # allocator.model imports this module
    from .model import Case, Requirement

MAX_EXPRESSION_LENGTH = 10_000
MAX_EXPRESSION_DEPTH = 200
MAX_EXPONENT = 64.0  # |constant exponent| above this is refused (e.g. 9**9**9)


class ExpressionError(ValueError):
    """An expression is not allowed or cannot be evaluated (message is one line)."""


def _atan2(y, x):
    """atan2 that also carries a complex-step perturbation.

    numpy's arctan2 is real-only; for ``y = y0 + i·dy``, ``x = x0 + i·dx`` (dy, dx
    infinitesimal) the first-order result is ``atan2(y0, x0) + i·(x0·dy − y0·dx)/(x0² + y0²)``.
    """
    if np.iscomplexobj(y) or np.iscomplexobj(x):
        y = np.asarray(y, dtype=complex)
        x = np.asarray(x, dtype=complex)
        y0, x0 = y.real, x.real
        return np.arctan2(y0, x0) + 1j * (x0 * y.imag - y0 * x.imag) / (x0**2 + y0**2)
    return np.arctan2(y, x)


FUNCTIONS: dict[str, tuple[int, Callable]] = {
    "sqrt": (1, np.sqrt),
    "exp": (1, np.exp),
    "log": (1, np.log),
    "sin": (1, np.sin),
    "cos": (1, np.cos),
    "tan": (1, np.tan),
    "asin": (1, np.arcsin),
    "acos": (1, np.arccos),
    "atan": (1, np.arctan),
    "atan2": (2, _atan2),
}
CONSTANTS = {"pi": math.pi}

_BINARY = {
    ast.Add: np.add,
    ast.Sub: np.subtract,
    ast.Mult: np.multiply,
    ast.Div: np.divide,
    ast.Pow: np.power,
}


def _parse(text: str) -> ast.Expression:
    if not isinstance(text, str) or not text.strip():
        raise ExpressionError("expression is empty")
    if len(text) > MAX_EXPRESSION_LENGTH:
        raise ExpressionError(f"expression is longer than {MAX_EXPRESSION_LENGTH} characters")
    try:
        return ast.parse(text.strip(), mode="eval")
    except SyntaxError as err:
        raise ExpressionError(f"expression is not valid: {err.msg}") from None
    except (RecursionError, MemoryError, ValueError):
        raise ExpressionError("expression is nested too deeply") from None


def _describe(node: ast.AST) -> str:
    if isinstance(node, ast.Attribute):
        return f"attribute access '.{node.attr}'"
    if isinstance(node, ast.Lambda):
        return "lambda"
    if isinstance(node, (ast.ListComp, ast.SetComp, ast.DictComp, ast.GeneratorExp)):
        return "comprehension"
    if isinstance(node, ast.Subscript):
        return "indexing"
    if isinstance(node, ast.Constant):
        return f"constant {node.value!r}"
    if isinstance(node, ast.BinOp):
        return f"operator {type(node.op).__name__}"
    if isinstance(node, ast.Compare):
        return "comparison"
    return type(node).__name__


def _compile(node: ast.AST, names: frozenset[str] | None, depth: int = 0, what: str = "a contributor"):
    """Check ``node`` against the whitelist and return ``(closure, used_names)``.

    The closure takes a mapping name -> value (float, array or complex) and returns
    the value of the subtree. ``names`` None means "any identifier is a contributor".
    """
    if depth > MAX_EXPRESSION_DEPTH:
        raise ExpressionError(f"expression is nested deeper than {MAX_EXPRESSION_DEPTH} levels")
    if isinstance(node, ast.Expression):
        return _compile(node.body, names, depth + 1, what)
    if isinstance(node, ast.Constant):
        if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
            raise ExpressionError(f"{_describe(node)} is not allowed (numbers only)")
        try:
            value = float(node.value)
        except OverflowError:  # an integer literal beyond the float range, e.g. 10**400 written out
            value = math.inf
        if not math.isfinite(value):
            raise ExpressionError("numbers in an expression must be finite")
        return (lambda env, v=value: v), frozenset()
    if isinstance(node, ast.Name):
        ident = node.id
        if ident.startswith("__"):
            raise ExpressionError(f"name '{ident}' is not allowed")
        if ident in CONSTANTS:
            return (lambda env, v=CONSTANTS[ident]: v), frozenset()
        if ident in FUNCTIONS:
            raise ExpressionError(f"function '{ident}' must be called, e.g. {ident}(x)")
        if names is not None and ident not in names:
            raise ExpressionError(f"unknown name '{ident}' (not {what}){did_you_mean(ident, names)}")
        return (lambda env, k=ident: env[k]), frozenset({ident})
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        inner, used = _compile(node.operand, names, depth + 1, what)
        if isinstance(node.op, ast.USub):
            return (lambda env: -inner(env)), used
        return inner, used
    if isinstance(node, ast.BinOp) and type(node.op) in _BINARY:
        left, used_l = _compile(node.left, names, depth + 1, what)
        right, used_r = _compile(node.right, names, depth + 1, what)
        if isinstance(node.op, ast.Pow) and not used_r:
            # a constant exponent must be modest: 9**9**9 would overflow or hang
            with np.errstate(all="ignore"):
                exponent = float(right({}))
            if not math.isfinite(exponent) or abs(exponent) > MAX_EXPONENT:
                raise ExpressionError(f"exponent is too large (|exponent| > {MAX_EXPONENT:g})")
        op = _BINARY[type(node.op)]
        return (lambda env: op(left(env), right(env))), used_l | used_r
    if isinstance(node, ast.Call):
        if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS:
            if not isinstance(node.func, ast.Name):
                raise ExpressionError(f"{_describe(node.func)} is not allowed in an expression")
            raise ExpressionError(
                f"call of '{node.func.id}' is not allowed (allowed: {', '.join(FUNCTIONS)})"
            )
        if node.keywords:
            raise ExpressionError(f"'{node.func.id}' takes no keyword arguments")
        arity, fn = FUNCTIONS[node.func.id]
        if len(node.args) != arity:
            raise ExpressionError(
                f"'{node.func.id}' takes {arity} argument{'s' if arity > 1 else ''}, "
                f"got {len(node.args)}"
            )
        if any(isinstance(a, ast.Starred) for a in node.args):
            raise ExpressionError("starred arguments are not allowed")
        compiled = [_compile(a, names, depth + 1, what) for a in node.args]
        closures = [c for c, _ in compiled]
        used = frozenset().union(*(u for _, u in compiled))
        if arity == 1:
            (arg,) = closures
            return (lambda env: fn(arg(env))), used
        return (lambda env: fn(*(c(env) for c in closures))), used
    raise ExpressionError(f"{_describe(node)} is not allowed in an expression")


@dataclass(frozen=True)
class CompiledExpression:
    """A checked expression: ``evaluate(values)`` with values a mapping name -> array."""

    text: str
    names: tuple[str, ...]  # contributor names used (stable order)
    _fn: Callable

    def evaluate(self, values: Mapping[str, object]) -> np.ndarray | float:
        """The expression at ``values`` (name -> number or array); nan or inf where undefined."""
        with np.errstate(all="ignore"):
            return self._fn(values)


def compile_expression(
    text: str, names: Iterable[str] | None = None, *, what: str = "a contributor"
) -> CompiledExpression:
    """Parse and check ``text``; raise :class:`ExpressionError` if it is not allowed.

    Parameters
    ----------
    text : str
        The expression, e.g. ``"v_in * r2 / (r1 + r2)"``.
    names : iterable of str, optional
        Contributor names allowed in the expression; any other identifier is an error.
        ``None`` accepts any identifier as a contributor name.
    what : str, optional
        What an allowed name is, for the message about any other name
        (``"a contributor or unknown"`` in a closure equation).
    """
    tree = _parse(text)
    allowed = None if names is None else frozenset(names)
    try:
        fn, used = _compile(tree, allowed, 0, what)
    except RecursionError:
        raise ExpressionError("expression is nested too deeply") from None
    order = [n.id for n in ast.walk(tree) if isinstance(n, ast.Name) and n.id in used]
    return CompiledExpression(text=text, names=tuple(dict.fromkeys(order)), _fn=fn)


def complex_step_gradient(fn: Callable, names: tuple[str, ...], point: Mapping[str, float]) -> np.ndarray:
    """Exact first derivatives of ``fn`` at ``point`` by the complex-step method.

    All names are perturbed at once along separate "lanes" (a vector of length n per
    name), so one vectorised evaluation gives the whole gradient.

    Parameters
    ----------
    fn : callable
        ``fn(env)`` with ``env`` a mapping name -> value; analytic in each value.
    names : tuple of str
        The variables to differentiate with respect to.
    point : mapping
        Values [length] at which to differentiate.

    Returns
    -------
    numpy.ndarray
        ``∂fn/∂name`` for each name, in order.

    Notes
    -----
    ``f'(x) = Im f(x + i·h) / h`` with ``h = 1e-200``: exact to machine precision for
    analytic ``f`` because no difference of nearly equal numbers is taken.

    References
    ----------
    .. [1] Squire, W. and Trapp, G. (1998). Using complex variables to estimate
       derivatives of real functions. SIAM Review 40(1), 110-112.
    .. [2] Martins, J. R. R. A., Sturdza, P. and Alonso, J. J. (2003). The complex-step
       derivative approximation. ACM Trans. Math. Softw. 29(3), 245-262.
    """
    n = len(names)
    h = 1e-200
    env = {}
    for j, name in enumerate(names):
        lane = np.full(n, complex(point[name]), dtype=complex)
        lane[j] += 1j * h
        env[name] = lane
    with np.errstate(all="ignore"):
        out = np.asarray(fn(env), dtype=complex)
    return np.broadcast_to(out, (n,)).imag / h


@dataclass(frozen=True)
class Linearisation:
    """First-order model of one requirement around the nominals.

    Attributes
    ----------
    requirement : str
    nominal : float
        Response at the nominals, ȳ [length or response unit].
    sensitivity : numpy.ndarray
        ``a_i = ∂y/∂x_i`` per contributor, in case order (0 where not involved).
    linear : bool
        True for a ``chain`` (then the model is exact).
    """

    requirement: str
    nominal: float
    sensitivity: np.ndarray
    linear: bool


def nominal_values(case: Case) -> dict[str, float]:
    """Each contributor's value at nominal as it enters a response: ``count · nominal``."""
    return {c.name: c.count * c.nominal for c in case.contributors}


def linearise(case: Case, requirement: Requirement) -> Linearisation:
    """Nominal response and exact sensitivities of ``requirement`` in ``case``.

    For a chain the sensitivities are the coefficients; for an expression they are
    exact derivatives at the nominals (complex step). An expression that names unknowns
    of the closure equations is taken at their nominal solution (``case.loop``), and its
    sensitivities go through the loop: ``dy/dx = ∂f/∂x − ∂f/∂u · (∂F/∂u)⁻¹ · ∂F/∂x``
    (implicit function theorem; :mod:`allocator.closure`).
    """
    names = case.names
    a = np.zeros(len(names))
    nominal_at = nominal_values(case)
    if requirement.chain is not None:
        for name, coeff in requirement.chain.items():
            a[case.index(name)] = float(coeff)
        y0 = float(sum(a[case.index(n)] * nominal_at[n] for n in requirement.chain))
        return Linearisation(requirement.name, y0, a, True)
    unknowns = case.unknown_names
    expr = compile_expression(requirement.expression, names + unknowns, what="a contributor or unknown")
    loop = case.loop if any(n in unknowns for n in expr.names) else None
    if loop is not None:  # the unknowns at the nominal solution of the closure equations
        nominal_at.update(loop.values_by_name)
    with np.errstate(all="ignore"):
        y0 = expr.evaluate(nominal_at)
    y0 = float(np.real(y0))
    if not math.isfinite(y0):
        raise ExpressionError("expression is not finite at the nominals")
    if expr.names:
        grad = complex_step_gradient(expr._fn, expr.names, nominal_at)
        if not np.all(np.isfinite(grad)):
            raise ExpressionError("expression has no finite derivative at the nominals")
        for name, g in zip(expr.names, grad):
            if loop is not None and name in loop.unknowns:
                # implicit function theorem: dy/dx = ∂f/∂x + ∂f/∂u · du/dx, du/dx = −F_u⁻¹ F_x
                a += g * loop.d_unknowns[loop.unknowns.index(name)]
            else:
                a[case.index(name)] += g
    return Linearisation(requirement.name, y0, a, False)


def linearise_all(case: Case) -> list[Linearisation]:
    """:func:`linearise` for every requirement, in case order."""
    return [linearise(case, r) for r in case.requirements]


def evaluate_response(case: Case, requirement: Requirement, values: Mapping[str, np.ndarray]) -> np.ndarray:
    """Exact response of ``requirement`` for sampled contributor values.

    ``values[name]`` is the sum over the contributor's ``count`` instances (an array);
    the expression (not its linearisation) is evaluated.
    """
    if requirement.chain is not None:
        total = 0.0
        for name, coeff in requirement.chain.items():
            total = total + float(coeff) * np.asarray(values[name], dtype=float)
        return np.asarray(total, dtype=float)
    unknowns = case.unknown_names
    expr = compile_expression(requirement.expression, case.names + unknowns, what="a contributor or unknown")
    if any(name in unknowns for name in expr.names):
        raise ExpressionError(
            f"requirement {requirement.name!r} names unknowns of the closure equations; "
            "evaluate it with allocator.closure.ResponseEvaluator, which solves the loop per sample"
        )
    return np.asarray(expr.evaluate(values), dtype=float)
