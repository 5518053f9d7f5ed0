"""Symplectic correctors for the drift-kick-drift Wisdom-Holman map.

Construction (Wisdom, Holman & Touma 1996): with X(a, c) = drift(a h) .
kick(c h) . drift(-a h), a corrector of order n = 2m + 1 is the product over
j = 1..m of X(a_j, c_j) X(-a_j, -c_j), with a_j = j alpha, alpha = sqrt(7/40),
and c_j solving 2 sum_j c_j a_j^(2k-1) / (2k-1)! = t_k for k = 1..m, where t_k
are the odd Taylor coefficients of 1 / (2 sinh(x/2)) - 1/x (-1/24, 7/5760,
...). The c_j are derived here exactly (rational arithmetic, then 60-digit
decimals, rounded once to double) for every odd order up to MAX_ORDER, and
checked by the tests against a derivation written there and the published
order-3 value -1/(48 alpha).
"""

from decimal import Decimal, localcontext
from fractions import Fraction
from functools import lru_cache
import math

# sqrt(7/40): spacing of the corrector's drift times.
ALPHA = math.sqrt(7.0 / 40.0)

# Highest order offered. The construction works for any odd order; ours stops
# here because the corrector's longest drift is (order - 1) / 2 * alpha steps
# (6.3 steps at 31) and its gain is long below the eps^2 dt^2 floor of the
# map (Laskar & Robutel 2001) by then. A limit of ours, not of the method.
MAX_ORDER = 31

# Orders a job may ask for: 0 means no corrector, then every odd order >= 3.
ORDERS = (0,) + tuple(range(3, MAX_ORDER + 1, 2))


def _bernoulli(n):
    """Bernoulli numbers B_0..B_n (B_1 = -1/2), exactly."""
    b = [Fraction(0)] * (n + 1)
    b[0] = Fraction(1)
    for m in range(1, n + 1):
        b[m] = -sum(math.comb(m + 1, k) * b[k] for k in range(m)) / Fraction(m + 1)
    return b


@lru_cache(maxsize=None)
def coefficients(order):
    """The c_j (j = 1..m) of the corrector of an odd order 2m + 1, as floats.

    Solved exactly in rational arithmetic for d_j = alpha c_j, then divided by
    alpha in 50-digit decimals and rounded once to double.
    """
    if order not in ORDERS or order == 0:
        raise ValueError(f"corrector order must be one of {ORDERS}, got {order}.")
    m = (order - 1) // 2
    b = _bernoulli(2 * m)
    # Odd Taylor coefficients of 1/(2 sinh(x/2)): (1 - 2^(2k-1)) B_2k / ((2k)! 2^(2k-1)).
    t = [(1 - Fraction(2) ** (2 * k - 1)) * b[2 * k]
         / (math.factorial(2 * k) * Fraction(2) ** (2 * k - 1)) for k in range(1, m + 1)]
    rows = [[Fraction(j) ** (2 * k - 1) for j in range(1, m + 1)]
            + [t[k - 1] * math.factorial(2 * k - 1) / (2 * Fraction(7, 40) ** (k - 1))]
            for k in range(1, m + 1)]
    for i in range(m):  # Gauss-Jordan, exact
        piv = next(r for r in range(i, m) if rows[r][i] != 0)
        rows[i], rows[piv] = rows[piv], rows[i]
        for r in range(m):
            if r != i:
                f = rows[r][i] / rows[i][i]
                rows[r] = [a - f * c for a, c in zip(rows[r], rows[i])]
    with localcontext() as ctx:
        ctx.prec = 60
        alpha = (Decimal(7) / Decimal(40)).sqrt()
        out = []
        for i in range(m):
            d = rows[i][m] / rows[i][i]
            out.append(float(Decimal(d.numerator) / Decimal(d.denominator) / alpha))
    return tuple(out)


def stages(order, sign=1.0):
    """Sequence of (a, c) pairs for X(a, c) applied left to right.

    ``sign=+1`` gives the corrector C applied to physical coordinates on entry;
    ``sign=-1`` gives its exact inverse C^-1 (reverse order, c -> -c) applied to
    copies for output.
    """
    if order == 0:
        return []
    seq = []
    for j, c in enumerate(coefficients(order), start=1):
        a = j * ALPHA
        seq.append((a, c))
        seq.append((-a, -c))
    if sign < 0:
        seq = [(a, -c) for a, c in reversed(seq)]
    return seq
