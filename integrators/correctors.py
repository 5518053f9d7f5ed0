"""Symplectic correctors for the drift-kick-drift Wisdom-Holman map.

Construction (Wisdom, Holman & Touma 1996): with X(a, c) = drift(a h) .
kick(c h) . drift(-a h), a corrector of order n = 2m + 1 is the product over
j = 1..m of X(a_j, c_j) X(-a_j, -c_j), with a_j = j alpha, alpha = sqrt(7/40),
and c_j solving 2 sum_j c_j a_j^(2k-1) / (2k-1)! = t_k for k = 1..m, where t_k
are the odd Taylor coefficients of 1 / (2 sinh(x/2)) - 1/x (-1/24, 7/5760,
...). The c_j below were derived exactly (rational arithmetic, then 50-digit
decimals) and are checked against that derivation by the tests; the order-3
value equals the published -1/(48 alpha).
"""

import math

# sqrt(7/40): spacing of the corrector's drift times.
ALPHA = math.sqrt(7.0 / 40.0)

# c_j by order, 21 significant digits (generated from tests/corrector_derivation.py).
COEFFICIENTS = {
    3: (-4.98011920555997349987e-2,),
    5: (-8.30019867593328916645e-2, 1.66003973518665783329e-2),
    7: (-1.07928798186254997444e-1, 3.65418464934042629561e-2, -4.98536228538442115581e-3),
    9: (-1.28083062593487570255e-1, 5.66961109006368357677e-2, -1.36229041741983809322e-2, 1.43959031480232662940e-3),
    11: (-1.45186789497685477349e-1, 7.62432273625773010173e-2, -2.46181571840398926351e-2, 4.69744305845907083766e-3, -4.07231592957093026033e-4),
    17: (-1.86112207542851917183e-1, 1.30385727152755787317e-1, -6.48443977294271605874e-2, 2.41435216446845821249e-2, -6.62651541387613113110e-3, 1.27199966151635317966e-3, -1.52872710455871476726e-4, 8.66948309467471603813e-6),
}

# Orders a job may ask for; 0 means no corrector.
ORDERS = (0,) + tuple(sorted(COEFFICIENTS))


def stages(order, sign=1.0):
    """Sequence of (a, c) pairs for X(a, c) applied left to right.

    ``sign=+1`` gives the corrector C applied to physical coordinates on entry;
    ``sign=-1`` gives its exact inverse C^-1 (reverse order, c -> -c) applied to
    copies for output.
    """
    if order == 0:
        return []
    if order not in COEFFICIENTS:
        raise ValueError(f"corrector order must be one of {ORDERS}, got {order}.")
    seq = []
    for j, c in enumerate(COEFFICIENTS[order], start=1):
        a = j * ALPHA
        seq.append((a, c))
        seq.append((-a, -c))
    if sign < 0:
        seq = [(a, -c) for a, c in reversed(seq)]
    return seq
