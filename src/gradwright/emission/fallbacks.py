"""Accurate pure-Python stand-ins for ``math`` functions missing in MicroPython.

The MicroPython build that generated scalar modules are tested on (the npm
package ``@micropython/micropython-webassembly-pyscript`` 1.27.0, see
``tests/micropython/PROBE.md``) lacks some functions of CPython's ``math``
module. For each of them :data:`FALLBACKS` holds the source text of a helper
function that a generated module can define and call instead.

Every helper source:

* is one ``def`` that uses only builtins and ``math.`` names present in that
  MicroPython build, so the generated module needs ``import math`` at its top;
* uses no f-strings and no imports, is deterministic text, and is left
  unchanged by ``black`` (default settings) and clean under ``ruff``;
* matches CPython's function to within the stated error in ulps (units in the
  last place of the exact result), and behaves like it on special values:
  same exception type on domain errors and overflow (``exp2``: OverflowError;
  ``fsum``: ValueError, OverflowError), ``inf`` where CPython returns it
  (``hypot`` overflow). MicroPython's own ``math`` functions raise ValueError
  on overflow instead (see PROBE.md).

Accuracy, as the largest error found in sweeps of 60,000-80,000 points over
each domain against mpmath at 50 digits (``tests/test_fallbacks.py`` checks
the bounds in parentheses):

========  ==============================================================
log1p     1.44 ulp (2): ``log(u) + (x - (u - 1)) / u`` with ``u = 1 + x``
exp2      0.51 ulp (1): ``math.pow(2.0, x)``, pow being accurate to < 1 ulp
cbrt      0.50 ulp (1): pow estimate, then one Newton step whose residual
          ``y**3 - b`` is computed exactly (split 26-bit products)
hypot     0.75 ulp (1): scaled by a power of two (no overflow/underflow),
          exact squares summed with compensation, one corrected square root
fsum      exact: correctly rounded (exact partial sums, half-even fix-up)
========  ==============================================================

:data:`NO_ACCURATE_FALLBACK` lists functions missing in MicroPython for which
no helper reaches that accuracy: none at present.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

MICROPYTHON_VERSION = "1.27.0"
"""Version of the MicroPython build that :data:`MICROPYTHON_MISSING` describes."""


@dataclass(frozen=True)
class Fallback:
    """A pure-Python helper standing in for one ``math`` function.

    Attributes:
        name: the ``math`` function replaced, e.g. ``"log1p"``.
        helper_name: the helper's function name in generated code.
        source: the exact source text of the helper, one ``def`` ending in a
            newline; it assumes ``import math`` at module level.
        needs: helper names of other fallbacks that ``source`` calls.
    """

    name: str
    helper_name: str
    source: str
    needs: tuple[str, ...] = ()


_LOG1P_SOURCE = """\
def _gw_log1p(x):
    # log(1 + x), accurate also for tiny |x|; stands in for math.log1p.
    if x == math.inf:
        return x
    u = 1.0 + x
    if u == 1.0:
        return x
    # x - (u - 1.0) is the exact rounding error of 1.0 + x.
    return math.log(u) + (x - (u - 1.0)) / u
"""

_EXP2_SOURCE = """\
def _gw_exp2(x):
    # 2.0 ** x; stands in for math.exp2.
    if 1024.0 <= x < math.inf:
        raise OverflowError("math range error")
    return math.pow(2.0, x)
"""

_CBRT_SOURCE = """\
def _gw_cbrt(x):
    # Real cube root; stands in for math.cbrt.
    if x == 0.0 or not math.isfinite(x):
        return x
    # |x| = b * 2 ** (3 * q) exactly, with b in [0.5, 4).
    m, e = math.frexp(math.fabs(x))
    q = e // 3
    b = math.ldexp(m, e - 3 * q)
    y = math.pow(b, 1.0 / 3.0)
    # One Newton step; the residual y * y * y - b is computed exactly
    # (split into 26-bit halves: y * y = p + pe, p * y = t + te).
    c = 134217729.0 * y
    yh = c - (c - y)
    yl = y - yh
    p = y * y
    pe = ((yh * yh - p) + 2.0 * yh * yl) + yl * yl
    c = 134217729.0 * p
    ph = c - (c - p)
    pl = p - ph
    t = p * y
    te = (((ph * yh - t) + ph * yl) + pl * yh) + pl * yl
    r = ((t - b) + te) + pe * y
    y = y - r / (3.0 * p)
    return math.copysign(math.ldexp(y, q), x)
"""

_HYPOT_SOURCE = """\
def _gw_hypot(*coordinates):
    # Euclidean norm without overflow or underflow; stands in for math.hypot.
    values = [math.fabs(float(c)) for c in coordinates]
    big = 0.0
    for a in values:
        if a == math.inf:
            return math.inf
        if a != a or a > big:
            big = a
    if big != big:
        return big
    if big == 0.0:
        return 0.0
    # Scale by a power of two so the largest value is in [0.5, 1).
    e = math.frexp(big)[1]
    total = 0.0
    comp = 0.0
    for a in values:
        t = math.ldexp(a, -e)
        # t * t = p + (exact error), by splitting t into 26-bit halves.
        p = t * t
        c = 134217729.0 * t
        th = c - (c - t)
        tl = t - th
        comp += ((th * th - p) + 2.0 * th * tl) + tl * tl
        # total + p = s + (exact error), by two-sum.
        s = total + p
        bp = s - total
        comp += (total - (s - bp)) + (p - bp)
        total = s
    r = math.sqrt(total + comp)
    # One correction step: r += (total + comp - r * r) / (2 * r).
    rr = r * r
    c = 134217729.0 * r
    rh = c - (c - r)
    rl = r - rh
    rr_err = ((rh * rh - rr) + 2.0 * rh * rl) + rl * rl
    r += (((total - rr) - rr_err) + comp) / (2.0 * r)
    if e > 1000:
        # Overflow gives inf, as math.hypot does (ldexp could raise).
        return math.ldexp(r, e - 1000) * 2.0**1000
    return math.ldexp(r, e)
"""

_FSUM_SOURCE = """\
def _gw_fsum(values):
    # Correctly rounded sum of floats; stands in for math.fsum.
    partials = []
    special = 0.0
    inf_sum = 0.0
    for value in values:
        x = float(value)
        if not math.isfinite(x):
            if math.isinf(x):
                inf_sum += x
            special += x
            continue
        # Add x to the exact, non-overlapping partial sums.
        i = 0
        for y in partials:
            if math.fabs(x) < math.fabs(y):
                x, y = y, x
            hi = x + y
            if math.isinf(hi):
                raise OverflowError("intermediate overflow in fsum")
            lo = y - (hi - x)
            if lo != 0.0:
                partials[i] = lo
                i += 1
            x = hi
        del partials[i:]
        partials.append(x)
    if special != 0.0:
        if inf_sum != inf_sum:
            raise ValueError("-inf + inf in fsum")
        return special
    n = len(partials)
    if n == 0:
        return 0.0
    # Sum the partials from the largest down, stopping at the first inexact
    # addition, then round half to even using the next partial's sign.
    n -= 1
    hi = partials[n]
    lo = 0.0
    while n > 0:
        x = hi
        n -= 1
        y = partials[n]
        hi = x + y
        lo = y - (hi - x)
        if lo != 0.0:
            break
    if n > 0 and (
        (lo < 0.0 and partials[n - 1] < 0.0) or (lo > 0.0 and partials[n - 1] > 0.0)
    ):
        y = lo * 2.0
        x = hi + y
        if y == x - hi:
            hi = x
    return hi
"""


def _fallback(name: str, source: str, needs: tuple[str, ...] = ()) -> Fallback:
    return Fallback(name=name, helper_name="_gw_" + name, source=source, needs=needs)


FALLBACKS: dict[str, Fallback] = {
    fallback.name: fallback
    for fallback in (
        _fallback("cbrt", _CBRT_SOURCE),
        _fallback("exp2", _EXP2_SOURCE),
        _fallback("fsum", _FSUM_SOURCE),
        _fallback("hypot", _HYPOT_SOURCE),
        _fallback("log1p", _LOG1P_SOURCE),
    )
}
"""Helpers by ``math`` function name, for every function MicroPython lacks."""

MICROPYTHON_MISSING: frozenset[str] = frozenset(
    {"cbrt", "exp2", "fsum", "hypot", "log1p"}
)
"""Probed ``math`` names absent from MicroPython :data:`MICROPYTHON_VERSION`."""

NO_ACCURATE_FALLBACK: frozenset[str] = frozenset()
"""Names in :data:`MICROPYTHON_MISSING` without an accurate helper."""


def helper_sources(names: Iterable[str]) -> str:
    """Source text defining the helpers for ``names`` and everything they need.

    ``names`` are ``math`` function names; names without a fallback are
    ignored. Helpers come in a deterministic order (dependencies first, then
    by name), separated by two blank lines.
    """
    by_helper = {fallback.helper_name: fallback for fallback in FALLBACKS.values()}
    ordered: list[Fallback] = []
    seen: set[str] = set()

    def visit(fallback: Fallback) -> None:
        if fallback.helper_name in seen:
            return
        seen.add(fallback.helper_name)
        for needed in sorted(fallback.needs):
            visit(by_helper[needed])
        ordered.append(fallback)

    for name in sorted(set(names)):
        if name in FALLBACKS:
            visit(FALLBACKS[name])
    return "\n\n".join(fallback.source for fallback in ordered)
