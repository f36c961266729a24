"""The pair-force kernel's 1 / r^3, and the float32-seeded alternative
refined to double, against the exact value; their bits against the
vectorised / scalar split."""

from decimal import Decimal, getcontext

import numpy as np
import pytest

from mdrotor.engine.kernels import inv_r3


def _exact(r2: np.ndarray) -> np.ndarray:
    """1 / (r2 sqrt(r2)) in 40-digit decimal arithmetic, rounded once to double."""
    getcontext().prec = 40
    return np.array([float(1 / (Decimal(x) * Decimal(x).sqrt())) for x in r2])


@pytest.mark.parametrize("refined", [False, True])
def test_inv_r3_within_two_ulp_over_thirty_decades(refined):
    # r from 1e-15 m to 1e15 m, log-uniform (crystals live at 1e-7..1e-4 m);
    # bound: one rounding in e = 1 - r2 y^2 (weight 3/2), one in y^2 * y, one in
    # the final sum, so |error| <= ~2 ulp of the result; the exact double
    # formula 1 / (r2 sqrt(r2)) itself reaches 2 ulp (IEEE 754 rounding,
    # common practice, no source)
    rng = np.random.default_rng(14)
    r = 10.0 ** rng.uniform(-15.0, 15.0, 5000)
    r2 = r * r
    got = np.empty_like(r2)
    inv_r3(r2, got, refined)
    want = _exact(r2)
    ulp = np.abs(got - want) / np.spacing(want)
    assert np.all(np.isfinite(got))
    assert ulp.max() <= 2.0, f"largest error {ulp.max()} ulp at r = {r[np.argmax(ulp)]:.3e} m"
    # and not merely bounded: on average below one ulp, like a correctly rounded formula
    assert ulp.mean() < 1.0


@pytest.mark.parametrize("refined", [False, True])
def test_inv_r3_same_bits_in_vector_body_and_scalar_remainder(refined):
    # the same value at every position of arrays of lengths that leave different
    # remainders after the vector body: no lane-dependent arithmetic
    r2 = np.full(37, 3.7e-11)
    for n in (1, 3, 4, 5, 8, 13, 37):
        out = np.empty(n)
        inv_r3(r2[:n], out, refined)
        assert np.all(out == out[0])
    mixed = np.random.default_rng(2).uniform(1e-12, 1e-8, 101)
    whole = np.empty(101)
    inv_r3(mixed, whole, refined)
    for k in range(101):  # one element at a time: the scalar path
        one = np.empty(1)
        inv_r3(mixed[k:k + 1], one, refined)
        assert one[0] == whole[k]
