"""The text pieces every generated kernel is made of: the numba expression dialect and the
snippets shared by the fast and the general integration paths.

:class:`KernelEmitter` turns validated trees into scalar numba code (only from trees:
generated names, ``repr`` floats, never user text); :func:`accumulate_lines` and
:func:`step_control_lines` are the fixed text of the residual sums and of the step-size
controller, with the names filled in, so that both paths (:mod:`graybox.simulate.kernel_fast`,
:mod:`graybox.simulate.kernel_general`) apply the reference's rules in one wording.
"""

from __future__ import annotations

from typing import Mapping

from graybox.model.codegen import Emitter
from graybox.model.expr import Call, Node

JIT_OPTIONS = "cache=True, error_model='numpy', nogil=True"
# Functions that never allocate run without numba's reference counting: otherwise every call
# with array arguments, even inlined, costs an atomic increment and decrement per array.
JIT_NO_ALLOC = JIT_OPTIONS + ", _nrt=False"
ARGS = ("x", "u", "p", "out")


class KernelEmitter(Emitter):
    """The scalar dialect for numba, with ``min``/``max`` as ``np.minimum``/``np.maximum`` so
    that a NaN argument propagates exactly as in the numpy dialect (the builtins would drop it
    depending on argument order).  ``seed`` pre-binds already computed nodes to names."""

    def __init__(self, env: Mapping[str, str], prefix: str = "_t", seed: Mapping[Node, str] | None = None):
        super().__init__(env, "scalar", prefix)
        if seed:
            self._memo.update(seed)

    def _expression(self, node: Node) -> str:
        if isinstance(node, Call) and node.fn in ("min", "max"):
            return f"np.{'minimum' if node.fn == 'min' else 'maximum'}({', '.join(self.value(a) for a in node.args)})"
        return super()._expression(node)

    def _inline(self, node: Node) -> str:
        if isinstance(node, Call) and node.fn in ("min", "max") and node not in self._memo:
            return f"np.{'minimum' if node.fn == 'min' else 'maximum'}({', '.join(self._inline(a) for a in node.args)})"
        return super()._inline(node)

    @property
    def bound(self) -> dict[Node, str]:
        """Every node this emitter has a name (or literal) for."""
        return dict(self._memo)


def indent(lines: list[str], level: int) -> list[str]:
    """The generated ``lines`` indented by ``level`` blocks of four spaces (blank lines kept blank)."""
    pad = "    " * level
    return [pad + line if line else line for line in lines]


# -- snippets shared by the kernels (fixed text, names filled in) -------------------------------

def accumulate_lines(res: str, r: str, tk: str) -> list[str]:
    """Add a compared residual to the sums (and the AR(1) innovation sums)."""
    return [
        f"sse[iset, {r}] += w[{r}] * {res} * {res}",
        "if ar:",
        f"    if has_prev[{r}]:",
        f"        pe = phi[{r}] ** (({tk} - prev_t[{r}]) / dt_ref[{r}])",
        f"        inn = {res} - pe * prev_r[{r}]",
        f"        ssa[iset, {r}] += w[{r}] * inn * inn",
        f"    prev_r[{r}] = {res}",
        f"    prev_t[{r}] = {tk}",
        f"    has_prev[{r}] = True",
    ]


def step_control_lines(accept_extra: list[str], order: str) -> list[str]:
    """The reference's controller for one set, after ``en`` and ``finite`` are known.
    Runs inside ``while s < span``; sets ``good = False`` and breaks on failure."""
    return [
        "steps_here += 1",
        "if not finite:",
        "    if h > hmin:",
        "        h *= 0.2  # a blow-up is treated as a rejected step first",
        "        continue",
        "    good = False",
        "    break",
        "if en <= 1.0:",
        "    s = s + h if span - s - h > 1e-12 * span else span",
        *indent(accept_extra, 1),
        "    n_acc += 1",
        "    if en == 0.0 or en < EN_GROW5:",
        "        h *= 5.0",
        "    else:",
        f"        h *= min(5.0, max(0.2, 0.9 * en ** (-1.0 / {order})))",
        "else:",
        f"    h *= max(0.2, 0.9 * en ** (-1.0 / {order}))",
        "if steps_here > MAX_STEPS or (h < hmin and en > 1.0):",
        "    good = False",
        "    break",
    ]
