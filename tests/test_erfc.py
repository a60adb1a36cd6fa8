"""The branch-free erfc and exponential of the pair kernels against reference libraries
(scipy.special and mpmath), over the whole range the sums use and beyond."""

import math

import mpmath
import numpy as np
from numba import njit
from scipy.special import erfc, erfcx

from madelung.ewald.erfc import erfc_and_gaussian, exp_nonpositive
from madelung.ewald.erfc_coefficients import ERFCX_POLYNOMIAL
from madelung.ewald.erfc_fit import evaluate, fit_coefficients


@njit(error_model="numpy", fastmath={"contract"})
def _kernel_values(x):
    """The kernels' inline arithmetic in a loop of the kind they vectorise."""
    value = np.empty_like(x)
    gaussian = np.empty_like(x)
    for t in range(x.shape[0]):
        value[t], gaussian[t] = erfc_and_gaussian(x[t])
    return value, gaussian


@njit(error_model="numpy")
def _exponentials(y):
    out = np.empty_like(y)
    for t in range(y.shape[0]):
        out[t] = exp_nonpositive(y[t])
    return out


def _arguments():
    rng = np.random.default_rng(7)
    # alpha r runs from about 0.3 to 6 in the sums at tol 1e-4 .. 1e-16; the smeared-ion sums go further
    return np.sort(np.concatenate([np.linspace(0.0, 8.0, 40001), rng.uniform(0.0, 27.0, 20000),
                                   [0.0, 1e-300, 1e-12, 0.5, 1.0, 2.0, 26.5]]))


def test_erfcx_polynomial_matches_scipy_on_the_half_line():
    x = np.concatenate([_arguments(), np.geomspace(27.0, 1e8, 500)])
    assert np.max(np.abs(evaluate(x) / erfcx(x) - 1.0)) < 4e-15


def test_kernel_erfc_matches_scipy_over_the_range_used():
    x = _arguments()
    value, gaussian = _kernel_values(x)
    reference = erfc(x)
    finite = reference > 1e-300
    # erfc's own condition number is 2 x^2 / (1 + ...): the exponential of -x*x carries the
    # rounding of x*x, as in any evaluation from the double x
    allowed = 4e-15 + 2.5e-16 * x[finite] ** 2
    assert np.all(np.abs(value[finite] / reference[finite] - 1.0) <= allowed)
    inside = x * x < 708.0  # below that the exponential is held at exp(-708)
    assert np.max(np.abs(gaussian[inside] / np.exp(-x[inside] ** 2) - 1.0)) < 4e-16


def test_kernel_erfc_against_mpmath_at_spot_values():
    mpmath.mp.dps = 30
    for x in (0.0, 0.1, 0.5, 1.0, math.sqrt(2.0), 2.5, 3.7, 4.9, 6.0, 7.5):
        value, _ = _kernel_values(np.array([x]))
        exact = float(mpmath.erfc(mpmath.mpf(x)))
        assert abs(value[0] / exact - 1.0) < 4e-15 + 2.5e-16 * x * x


def test_exponential_of_the_kernels():
    y = -np.concatenate([np.linspace(0.0, 30.0, 30001), np.geomspace(1e-18, 700.0, 3000)])
    assert np.max(np.abs(_exponentials(y) / np.exp(y) - 1.0)) < 4e-16
    # below -708 the argument is held at -708: still positive and far below anything summed
    assert 0.0 < _exponentials(np.array([-800.0]))[0] <= math.exp(-708.0) * (1 + 1e-15)


def test_committed_coefficients_are_the_fit():
    """A refit reproduces the committed polynomial as a function, to a few units in the last place.

    The coefficients may differ in their last bits between numpy/LAPACK builds (a least-squares
    fit); what the kernels rely on is the function they define, so that is compared.
    """
    x = np.linspace(0.0, 30.0, 20001)
    assert np.max(np.abs(evaluate(x, fit_coefficients()) / evaluate(x, ERFCX_POLYNOMIAL) - 1.0)) < 1e-15
