"""Python source emitted from validated expression trees (never from user text).

Every non-leaf node becomes one assignment to a generated temporary (``_t0``, ``_t1``, ...),
emitted once however often it occurs, so equal sub-expressions are computed once
(common-subexpression elimination falls out of the trees being hashable).  Symbols are
replaced by access expressions chosen by the caller (``x[0]``, ``p[2]``, ...), numbers are
written with ``repr`` of a float.  Two dialects:

* ``"numpy"``: every variable may be an array over parameter sets; conditionals become
  ``np.where`` (both branches evaluated, the selected one kept: numpy error semantics);
* ``"scalar"``: plain scalars, for the compiled (numba) core; conditionals are short-circuit.

An operator between two numbers (one the simplifier left unfolded because it has no finite
value, e.g. ``0.0/0.0`` in a derivative) is emitted as its IEEE value (``np.nan``,
``np.inf``): as Python floats it would raise ZeroDivisionError or OverflowError, or give a
complex number, at run time.
"""

from __future__ import annotations

from typing import Mapping, Sequence

from graybox.model.expr import BinOp, Call, Compare, IfElse, Logic, Neg, Node, Num, Sym

_NUMPY_FN = {
    "exp": "np.exp", "log": "np.log", "log10": "np.log10", "sqrt": "np.sqrt", "abs": "np.abs",
    "sin": "np.sin", "cos": "np.cos", "tan": "np.tan", "tanh": "np.tanh", "sinh": "np.sinh",
    "cosh": "np.cosh", "atan": "np.arctan", "min": "np.minimum", "max": "np.maximum",
}
DIALECTS = ("numpy", "scalar")


def ieee_value(op: str, a: float, b: float) -> float:
    """``a op b`` in IEEE double arithmetic (numpy's semantics: inf and nan, never raising)."""
    import numpy as np

    x, y = np.float64(a), np.float64(b)
    with np.errstate(all="ignore"):
        out = {"+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide, "**": np.power}[op](x, y)
    return float(out)


def _constant_binop(node: Node) -> str | None:
    if isinstance(node, BinOp) and isinstance(node.left, Num) and isinstance(node.right, Num):
        return literal(ieee_value(node.op, node.left.value, node.right.value))
    return None


def literal(value: float) -> str:
    """A float literal that round-trips exactly (``repr``), parenthesised when negative."""
    text = repr(float(value))
    if text in ("inf", "-inf", "nan"):
        return {"inf": "np.inf", "-inf": "(-np.inf)", "nan": "np.nan"}[text]
    return f"({text})" if text.startswith("-") else text


class Emitter:
    """Accumulates straight-line code for many trees, sharing temporaries between them."""

    def __init__(self, env: Mapping[str, str], dialect: str = "numpy", prefix: str = "_t"):
        if dialect not in DIALECTS:
            raise ValueError(f"unknown dialect {dialect!r}")
        self.env = dict(env)
        self.dialect = dialect
        self.prefix = prefix
        self.lines: list[str] = []
        self._memo: dict[Node, str] = {}

    def value(self, node: Node) -> str:
        """Code for the value of ``node`` (a literal, an access expression or a temporary)."""
        if node in self._memo:
            return self._memo[node]
        if isinstance(node, Num):
            code = literal(node.value)
            self._memo[node] = code
            return code
        if isinstance(node, Sym):
            if node.name not in self.env:
                raise KeyError(f"symbol {node.name!r} has no access expression")
            code = self.env[node.name]
            self._memo[node] = code
            return code
        folded = _constant_binop(node)
        if folded is not None:
            self._memo[node] = folded
            return folded
        rhs = self._expression(node)
        name = f"{self.prefix}{len(self._memo)}"
        self.lines.append(f"{name} = {rhs}")
        self._memo[node] = name
        return name

    def _expression(self, node: Node) -> str:
        v = self.value
        if isinstance(node, BinOp):
            return f"{v(node.left)} {node.op} {v(node.right)}"
        if isinstance(node, Neg):
            return f"-{v(node.arg)}"
        if isinstance(node, Call):
            args = ", ".join(v(a) for a in node.args)
            if self.dialect == "scalar" and node.fn in ("min", "max", "abs"):
                return f"{node.fn}({args})"
            return f"{_NUMPY_FN[node.fn]}({args})"
        if isinstance(node, Compare):
            return f"{v(node.left)} {node.op} {v(node.right)}"
        if isinstance(node, Logic):
            if self.dialect == "numpy":
                if node.op == "not":
                    return f"np.logical_not({v(node.left)})"
                return f"np.logical_{node.op}({v(node.left)}, {v(node.right)})"
            if node.op == "not":
                return f"not {v(node.left)}"
            return f"{v(node.left)} {node.op} {v(node.right)}"
        if isinstance(node, IfElse):
            if self.dialect == "numpy":
                return f"np.where({v(node.cond)}, {v(node.then)}, {v(node.other)})"
            # Short-circuit: only the chosen branch is evaluated.  Branch temporaries are
            # emitted inline so that they are not computed unconditionally.
            return f"({self._inline(node.then)} if {v(node.cond)} else {self._inline(node.other)})"
        raise TypeError(node)

    def _inline(self, node: Node) -> str:
        """A nested expression without temporaries (for conditional branches)."""
        if isinstance(node, (Num, Sym)) or node in self._memo or _constant_binop(node) is not None:
            return self.value(node)
        if isinstance(node, BinOp):
            return f"({self._inline(node.left)} {node.op} {self._inline(node.right)})"
        if isinstance(node, Neg):
            return f"(-{self._inline(node.arg)})"
        if isinstance(node, Call):
            args = ", ".join(self._inline(a) for a in node.args)
            fn = node.fn if node.fn in ("min", "max", "abs") else _NUMPY_FN[node.fn]
            return f"{fn}({args})"
        if isinstance(node, Compare):
            return f"({self._inline(node.left)} {node.op} {self._inline(node.right)})"
        if isinstance(node, Logic):
            if node.op == "not":
                return f"(not {self._inline(node.left)})"
            return f"({self._inline(node.left)} {node.op} {self._inline(node.right)})"
        if isinstance(node, IfElse):
            return f"({self._inline(node.then)} if {self._inline(node.cond)} else {self._inline(node.other)})"
        raise TypeError(node)

    def assign(self, target: str, node: Node) -> None:
        """Append ``target = <value of node>`` (``target`` is generated text such as ``out[0, 1]``),
        emitting the node's temporaries first."""
        self.lines.append(f"{target} = {self.value(node)}")


def function_source(name: str, args: Sequence[str], body: Sequence[str], indent: str = "    ") -> str:
    """Source of a function with the given generated body lines (no return unless in body)."""
    lines = [f"def {name}({', '.join(args)}):"]
    lines += [indent + line for line in body] or [indent + "pass"]
    return "\n".join(lines) + "\n"


def compile_functions(source: str, names: Sequence[str], filename: str = "<graybox-generated>") -> dict:
    """Compile generated source (emitted only from validated trees) and return the named
    functions.  The namespace holds only numpy."""
    import numpy as np

    namespace: dict = {"np": np}
    code = compile(source, filename, "exec")
    exec(code, namespace)  # noqa: S102 - source generated from validated trees only
    return {n: namespace[n] for n in names}
