"""Branch-free erfc and exponential for the pair kernels, written so that loops over pairs vectorise.

``erfc_and_gaussian(x)`` returns (erfc(x), exp(-x^2)) for x >= 0 from one exponential and the
polynomial of ``erfc_fit.py``: erfc(x) = exp(-x^2) s P(1 - 2 c s), s = 1 / (x + c). The library
``math.exp`` and ``math.erfc`` are calls the compiler cannot put into vector instructions, so the
exponential is computed here too, the usual way: exp(y) = 2^k exp(r) with k the nearest integer
to y / ln 2, r = y - k ln 2 (ln 2 in two parts, so r is exact to rounding), exp(r) by its Taylor
polynomial of degree 13 on |r| <= ln(2) / 2 (remainder below 2e-17) and 2^k written directly into
the exponent bits of a double. Arguments below -708 are taken as -708 (exp(-708) = 3e-308, far
below anything the sums can resolve). Both are accurate to a few units in the last place
(tests/test_erfc.py).

The kernels must be compiled with ``error_model="numpy"`` (no zero-division check, which would
put a branch into every loop) for the loops to vectorise.

References
----------
W. J. Cody and W. Waite, Software Manual for the Elementary Functions (Prentice-Hall, 1980)
(argument reduction of the exponential with ln 2 split into two parts).
"""

import math

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic

from .erfc_coefficients import ERFCX_POLYNOMIAL, SHIFT

_DEGREE = len(ERFCX_POLYNOMIAL) - 1
_LOG2_E = 1.4426950408889634
_LN2_HIGH = 6.93147180369123816490e-01  # ln 2 to 32 bits: k * _LN2_HIGH is exact
_LN2_LOW = 1.90821492927058770002e-10
_LOWEST = -708.0


@intrinsic
def _double_from_bits(typingctx, bits):
    """The float64 whose IEEE-754 bit pattern is the int64 ``bits``."""
    signature = types.float64(types.int64)

    def codegen(context, builder, sig, args):
        return builder.bitcast(args[0], ir.DoubleType())

    return signature, codegen


@njit(cache=True, inline="always", error_model="numpy")
def exp_nonpositive(y):
    """exp(y) for y <= 0 (y below -708 is taken as -708), branch-free."""
    y = max(y, _LOWEST)
    k = math.floor(y * _LOG2_E + 0.5)
    r = (y - k * _LN2_HIGH) - k * _LN2_LOW
    p = 1.0 / 6227020800.0
    p = p * r + 1.0 / 479001600.0
    p = p * r + 1.0 / 39916800.0
    p = p * r + 1.0 / 3628800.0
    p = p * r + 1.0 / 362880.0
    p = p * r + 1.0 / 40320.0
    p = p * r + 1.0 / 5040.0
    p = p * r + 1.0 / 720.0
    p = p * r + 1.0 / 120.0
    p = p * r + 1.0 / 24.0
    p = p * r + 1.0 / 6.0
    p = p * r + 0.5
    p = p * r + 1.0
    p = p * r + 1.0
    return p * _double_from_bits((np.int64(k) + 1023) << 52)


@njit(cache=True, inline="always", error_model="numpy")
def erfcx_polynomial(x):
    """exp(x^2) erfc(x) for x >= 0, branch-free."""
    s = 1.0 / (x + SHIFT)
    u = 1.0 - 2.0 * SHIFT * s
    p = ERFCX_POLYNOMIAL[_DEGREE]
    for d in range(_DEGREE - 1, -1, -1):
        p = p * u + ERFCX_POLYNOMIAL[d]
    return p * s


@njit(cache=True, inline="always", error_model="numpy")
def erfc_and_gaussian(x):
    """(erfc(x), exp(-x^2)) for x >= 0, branch-free."""
    gaussian = exp_nonpositive(-x * x)
    return erfcx_polynomial(x) * gaussian, gaussian
