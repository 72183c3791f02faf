"""PEtab formulas (observable, noise) parsed with sympy and compiled to numpy, never ``eval``'d.

Every name in a formula is made a plain :class:`sympy.Symbol` before parsing, so that model ids
such as ``beta``, ``gamma``, ``E`` or ``I`` keep their meaning in the model instead of turning
into sympy's functions and constants. Numbers, + - * / ^ **, parentheses and the functions
PEtab v1 lists (exp, log, ln, log10, log2, sqrt, abs, sin, cos, tan, min/max, pow, ...) are
understood.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import sympy

from curate.errors import InputError

__all__ = ["Formula", "parse_formula"]

_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
# the functions a PEtab v1 formula may call (the SBML L3 math functions the spec names)
_FUNCTIONS: dict[str, object] = {
    "exp": sympy.exp, "log": sympy.log, "ln": sympy.log, "log10": lambda x: sympy.log(x, 10),
    "log2": lambda x: sympy.log(x, 2), "sqrt": sympy.sqrt, "abs": sympy.Abs, "sin": sympy.sin,
    "cos": sympy.cos, "tan": sympy.tan, "sinh": sympy.sinh, "cosh": sympy.cosh,
    "tanh": sympy.tanh, "arcsin": sympy.asin, "arccos": sympy.acos, "arctan": sympy.atan,
    "pow": sympy.Pow, "power": sympy.Pow, "min": sympy.Min, "max": sympy.Max,
    "floor": sympy.floor, "ceil": sympy.ceiling, "pi": sympy.pi,
}  # fmt: skip


@dataclass(frozen=True)
class Formula:
    """A parsed formula: its text, the names it uses and a numpy function of them."""

    text: str
    names: tuple[str, ...]
    function: Callable[..., object]

    def __call__(self, values: dict[str, np.ndarray], size: int) -> np.ndarray:
        """Give the formula's value for each of ``size`` rows (values: name -> array or number)."""
        result = self.function(*[values[name] for name in self.names])
        if isinstance(result, np.ndarray) and result.shape == (size,) and result.dtype == float:
            return result
        return np.broadcast_to(np.asarray(result, dtype=float), (size,)).astype(float)


def parse_formula(text: str, *, where: str) -> Formula:
    """Give the compiled formula; ``where`` names file, row and column for the error line."""
    source = str(text).strip()
    if not source:
        raise InputError(f"{where}: empty formula")
    if re.search(r"\*\s+\*|\*{3,}|[+\-*/^]\s*$|^\s*[*/^]", source):
        raise InputError(
            f"{where}: cannot read formula '{source}' (an operator without its operand)"
        )
    depth = 0
    for character in source:
        depth += {"(": 1, ")": -1}.get(character, 0)
        if depth < 0:
            break
    if depth != 0:
        raise InputError(f"{where}: cannot read formula '{source}' (unbalanced parentheses)")
    names = {n for n in _NAME.findall(source) if n not in _FUNCTIONS}
    local: dict[str, object] = {name: sympy.Symbol(name) for name in names}
    local.update(_FUNCTIONS)
    try:
        expression = sympy.sympify(source.replace("^", "**"), locals=local, rational=False)
    except (sympy.SympifyError, SyntaxError, TypeError, ValueError) as err:
        reason = (str(err).strip().splitlines() or [""])[0]
        if not reason or "Sympify of expression" in reason or "could not parse" in reason:
            reason = "not an arithmetic expression PEtab v1 reads"
        raise InputError(f"{where}: cannot read formula '{source}' ({reason})") from None
    if not isinstance(expression, sympy.Expr):
        raise InputError(f"{where}: formula '{source}' is not an arithmetic expression")
    used = tuple(sorted(str(s) for s in expression.free_symbols))
    function = sympy.lambdify([sympy.Symbol(n) for n in used], expression, modules="numpy")
    return Formula(source, used, function)
