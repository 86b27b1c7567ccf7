"""A small arithmetic language for rate expressions, compiled to numpy.

Expressions are parsed with :mod:`ast` and walked node by node; only numbers,
whitelisted names, the arithmetic operators ``+ - * / **``, unary minus and a
fixed set of functions are accepted. Nothing from user text is ever passed to
``eval`` or ``exec``: compilation builds a tree of Python closures.
"""

from __future__ import annotations

import ast
import math
from collections.abc import Callable, Iterable, Mapping
from typing import Any

import numpy as np

__all__ = ["ExpressionError", "FUNCTIONS", "CompiledExpression", "compile_expression"]

Value = Any  # float or ndarray
Evaluator = Callable[[Mapping[str, Value]], Value]


class ExpressionError(ValueError):
    """A rate expression uses syntax or names that are not allowed."""


FUNCTIONS: dict[str, tuple[int, Callable[..., Value]]] = {
    "exp": (1, np.exp),
    "log": (1, np.log),
    "sqrt": (1, np.sqrt),
    "sin": (1, np.sin),
    "cos": (1, np.cos),
    "abs": (1, np.abs),
    "min": (2, np.minimum),
    "max": (2, np.maximum),
    # step(x) is 1 where x >= 0 else 0: switches a rate on at a time.
    "step": (1, lambda x: np.where(np.asarray(x) >= 0, 1.0, 0.0)),
}
CONSTANTS = {"pi": math.pi}

_BINARY = {
    ast.Add: np.add,
    ast.Sub: np.subtract,
    ast.Mult: np.multiply,
    ast.Div: np.divide,
    ast.Pow: np.power,
}


class CompiledExpression:
    """A compiled expression: call it with a mapping of name -> value."""

    def __init__(self, source: str, names: frozenset[str], fn: Evaluator) -> None:
        self.source = source
        self.names = names
        self._fn = fn

    def __call__(self, env: Mapping[str, Value]) -> Value:
        return self._fn(env)

    def __repr__(self) -> str:
        return f"CompiledExpression({self.source!r})"


def compile_expression(source: str, allowed_names: Iterable[str]) -> CompiledExpression:
    """Compile ``source`` so it may only read ``allowed_names``.

    Raises
    ------
    ExpressionError
        With the offending piece of text and what is allowed instead.
    """
    allowed = frozenset(allowed_names)
    if not isinstance(source, str) or not source.strip():
        raise ExpressionError(f"expression must be a non-empty string, got {source!r}")
    if len(source) > 2000:
        raise ExpressionError(f"expression is {len(source)} characters long; at most 2000 allowed")
    try:
        tree = ast.parse(source.strip(), mode="eval")
    except SyntaxError as exc:
        raise ExpressionError(f"expression {source!r} is not valid arithmetic: {exc.msg}") from None
    used: set[str] = set()

    def build(node: ast.AST) -> Evaluator:
        if isinstance(node, ast.Expression):
            return build(node.body)
        if isinstance(node, ast.Constant) and isinstance(node.value, (int, float)) and not isinstance(
            node.value, bool
        ):
            value = float(node.value)
            return lambda env: value
        if isinstance(node, ast.Name):
            name = node.id
            if name in CONSTANTS:
                const = CONSTANTS[name]
                return lambda env: const
            if name not in allowed:
                raise ExpressionError(
                    f"name {name!r} in expression {source!r} is not defined; "
                    f"allowed names: {sorted(allowed | set(CONSTANTS))}"
                )
            used.add(name)
            return lambda env: env[name]
        if isinstance(node, ast.BinOp) and type(node.op) in _BINARY:
            op = _BINARY[type(node.op)]
            left, right = build(node.left), build(node.right)
            return lambda env: op(left(env), right(env))
        if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
            operand = build(node.operand)
            if isinstance(node.op, ast.USub):
                return lambda env: np.negative(operand(env))
            return operand
        if isinstance(node, ast.Call):
            if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS:
                shown = ast.unparse(node.func)
                raise ExpressionError(
                    f"function {shown!r} in expression {source!r} is not allowed; "
                    f"allowed functions: {sorted(FUNCTIONS)}"
                )
            arity, fn = FUNCTIONS[node.func.id]
            if node.keywords or len(node.args) != arity:
                raise ExpressionError(
                    f"function {node.func.id!r} in expression {source!r} takes {arity} "
                    f"positional argument(s), got {len(node.args)}"
                    + (" and keywords" if node.keywords else "")
                )
            args = [build(a) for a in node.args]
            if arity == 1:
                (a0,) = args
                return lambda env: fn(a0(env))
            a0, a1 = args
            return lambda env: fn(a0(env), a1(env))
        shown = ast.unparse(node) if isinstance(node, ast.expr) else type(node).__name__
        raise ExpressionError(
            f"{shown!r} in expression {source!r} is not allowed; only numbers, names, "
            "+ - * / **, unary minus and the functions "
            f"{sorted(FUNCTIONS)} may be used"
        )

    fn = build(tree)
    return CompiledExpression(source, frozenset(used), fn)
