"""Small arithmetic expressions in driver files: ``"window_s / 10"``, ``"-round(pretrigger_fraction * n_samples)"``.

Instruments disagree on the units of a setting (per division or per window, pre-trigger as a sample offset
or as a share); the role speaks one language and the driver file converts. A driver file is data, so the
expression is parsed with ``ast`` and only numbers, named inputs, + − × ÷, unary minus, parentheses and a
few pure functions are accepted — never ``eval``: no attribute access, no subscripts, no other calls.
"""

from __future__ import annotations

import ast
import math
import operator
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass

_BINARY: dict[type[ast.operator], Callable[[float, float], float]] = {
    ast.Add: operator.add, ast.Sub: operator.sub, ast.Mult: operator.mul, ast.Div: operator.truediv,
}
_UNARY: dict[type[ast.unaryop], Callable[[float], float]] = {ast.USub: operator.neg, ast.UAdd: operator.pos}
_FUNCTIONS: dict[str, Callable[..., float]] = {"round": round, "abs": abs, "min": min, "max": max}

ALLOWED = "numbers, input names, + - * /, parentheses and round(), abs(), min(), max()"


class ExpressionError(ValueError):
    """The expression uses something outside the whitelist, or cannot be evaluated with these values."""


@dataclass(frozen=True)
class Expression:
    """A parsed, checked expression; ``names`` are the inputs it reads."""

    text: str
    tree: ast.Expression
    names: frozenset[str]

    @classmethod
    def parse(cls, text: str, known: Iterable[str]) -> Expression:
        """Parse ``text`` and check every node and every name before anything runs."""
        if not isinstance(text, str) or not text.strip():
            raise ExpressionError(f"must be an arithmetic expression in a string, not {text!r}")
        try:
            tree = ast.parse(text.strip(), mode="eval")
        except SyntaxError as exc:
            raise ExpressionError(f"{text!r} is not an expression ({exc.msg})") from None
        known = set(known)
        names: set[str] = set()
        for node in ast.walk(tree):
            _check_node(node, text)
            if isinstance(node, ast.Name) and not _is_function_name(node, tree):
                if node.id not in known:
                    raise ExpressionError(f"{text!r} uses {node.id!r}; names allowed here: "
                                          f"{', '.join(sorted(known)) or '(none)'}")
                names.add(node.id)
        return cls(text.strip(), tree, frozenset(names))

    def evaluate(self, values: Mapping[str, float]) -> float:
        """The value for these inputs; a result that is not a finite number is an ExpressionError."""
        try:
            result = _evaluate(self.tree.body, values)
        except (ZeroDivisionError, OverflowError, TypeError) as exc:
            raise ExpressionError(f"{self.text!r} cannot be evaluated: {exc}") from None
        if isinstance(result, bool) or not isinstance(result, (int, float)) or not math.isfinite(result):
            raise ExpressionError(f"{self.text!r} gave {result!r}, not a finite number")
        return result


def _is_function_name(node: ast.Name, tree: ast.Expression) -> bool:
    return any(isinstance(call, ast.Call) and call.func is node for call in ast.walk(tree))


def _check_node(node: ast.AST, text: str) -> None:
    allowed = (ast.Expression, ast.BinOp, ast.UnaryOp, ast.Constant, ast.Name, ast.Call, ast.Load,
               *_BINARY, *_UNARY)
    if not isinstance(node, allowed):
        raise ExpressionError(f"{text!r}: {type(node).__name__} is not allowed; allowed: {ALLOWED}")
    if isinstance(node, ast.Constant) and (isinstance(node.value, bool)
                                           or not isinstance(node.value, (int, float))):
        raise ExpressionError(f"{text!r}: only numbers may appear as constants, not {node.value!r}")
    if isinstance(node, ast.Call) and (not isinstance(node.func, ast.Name) or node.func.id not in _FUNCTIONS
                                       or node.keywords or not node.args):
        raise ExpressionError(f"{text!r}: only calls like round(x), abs(x), min(a, b), max(a, b) are allowed")


def _evaluate(node: ast.AST, values: Mapping[str, float]) -> float:
    if isinstance(node, ast.Constant):
        return node.value
    if isinstance(node, ast.Name):
        return values[node.id]
    if isinstance(node, ast.BinOp):
        return _BINARY[type(node.op)](_evaluate(node.left, values), _evaluate(node.right, values))
    if isinstance(node, ast.UnaryOp):
        return _UNARY[type(node.op)](_evaluate(node.operand, values))
    assert isinstance(node, ast.Call) and isinstance(node.func, ast.Name)  # guaranteed by _check_node
    return _FUNCTIONS[node.func.id](*(_evaluate(arg, values) for arg in node.args))
