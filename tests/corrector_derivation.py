"""Exact derivation of the corrector coefficients c_j (used by the tests).

Solves 2 sum_j c_j a_j^(2k-1)/(2k-1)! = t_k, a_j = j sqrt(7/40), with t_k the
odd Taylor coefficients of 1/(2 sinh(x/2)) - 1/x, in rational arithmetic,
then to 40-digit decimals (construction in ../shared/CHECKS.md; Wisdom,
Holman & Touma 1996).
"""

from decimal import Decimal, getcontext
from fractions import Fraction
from math import comb, factorial


def bernoulli(n):
    """Bernoulli numbers B_0..B_n (B_1 = -1/2)."""
    b = [Fraction(0)] * (n + 1)
    b[0] = Fraction(1)
    for m in range(1, n + 1):
        b[m] = -sum(comb(m + 1, k) * b[k] for k in range(m)) / Fraction(m + 1)
    return b


def taylor_coefficient(k):
    """Coefficient of x^(2k-1) in 1/(2 sinh(x/2)): (1 - 2^(2k-1)) B_2k / ((2k)! 2^(2k-1))."""
    b = bernoulli(2 * k)
    return (1 - Fraction(2) ** (2 * k - 1)) * b[2 * k] / (factorial(2 * k) * Fraction(2) ** (2 * k - 1))


def coefficients(order, digits=40):
    """The c_j of a corrector of the given odd order, as Decimals."""
    getcontext().prec = digits + 10
    m = (order - 1) // 2
    # c_j = d_j / alpha with sum_j d_j j^(2k-1) = t_k (2k-1)! / (2 (7/40)^(k-1)).
    rows = [[Fraction(j) ** (2 * k - 1) for j in range(1, m + 1)]
            + [taylor_coefficient(k) * factorial(2 * k - 1) / (2 * Fraction(7, 40) ** (k - 1))]
            for k in range(1, m + 1)]
    for i in range(m):
        piv = next(r for r in range(i, m) if rows[r][i] != 0)
        rows[i], rows[piv] = rows[piv], rows[i]
        for r in range(m):
            if r != i:
                f = rows[r][i] / rows[i][i]
                rows[r] = [a - f * c for a, c in zip(rows[r], rows[i])]
    alpha = (Decimal(7) / Decimal(40)).sqrt()
    return [Decimal(rows[i][m].numerator) / Decimal(rows[i][m].denominator)
            / Decimal(rows[i][i].numerator) * Decimal(rows[i][i].denominator) / alpha
            for i in range(m)]
