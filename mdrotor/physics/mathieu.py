"""Mathieu equation of a Paul trap: characteristic exponent, stability and
Laplace-consistent trap parameters.

Convention
----------
Along one principal axis ``u`` an ion in an RF (Paul) trap obeys

    u''(t) = -(W^2 / 4) (a - 2 q cos(W t)) u,        W = 2 pi f_drive,

which with ``xi = W t / 2`` is the Mathieu equation in the standard form

    d^2u/dxi^2 + (a - 2 q cos 2 xi) u = 0

(D. Leibfried, R. Blatt, C. Monroe, D. Wineland, Rev. Mod. Phys. 75, 281
(2003); R.E. March, J. Mass Spectrom. 32, 351 (1997); NIST DLMF 28.2.1).
By Floquet's theorem a stable solution is ``u = Re[e^{i beta xi} P(xi)]``
with ``P`` pi-periodic; ``beta`` is the characteristic exponent. The secular
(angular) frequency is ``w = beta W / 2``, i.e. in cyclic units

    f_secular = beta f_drive / 2.

The *first stability region* is the set of (a, q) with 0 < beta < 1. Its
boundaries are the characteristic values a_0(|q|) (beta = 0) and b_1(|q|)
(beta = 1) of the periodic Mathieu functions (DLMF 28.2(v)). beta depends on
q only through |q| (shift xi -> xi + pi/2 flips the sign of q).

Everything here is dimensionless except the frequencies, which are cyclic
(Hz) at the boundary, as everywhere in mdrotor.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import integrate, linalg, optimize

from mdrotor.errors import InputError, PhysicsError

__all__ = [
    "characteristic_exponent",
    "characteristic_exponent_floquet",
    "is_stable",
    "stability_boundaries",
    "lowest_order_beta",
    "secular_frequency_hz",
    "solve_point_trap",
    "micromotion_amplitude_ratio",
    "transfer_matrices",
]


# ---------------------------------------------------------------------------
# internal scalar helpers
# ---------------------------------------------------------------------------

def _hill_size(a: float, q: float) -> int:
    # Fourier coefficients c_{2n} of the Floquet solution fall off once
    # (2n)^2 >> |a|, |q|; 25 extra harmonics beyond that leave them far
    # below 1e-16 (checked against doubled sizes during development).
    return 25 + int(3.0 * math.sqrt(abs(a) + abs(q)))


def _hill_lowest(nu: float, q: float, m: int) -> float:
    """Lowest eigenvalue of the truncated Hill matrix of exponent ``nu``.

    The Fourier coefficients of ``e^{i nu xi} sum_n c_2n e^{2 i n xi}`` obey
    ``q c_{2n+2} - ((nu + 2n)^2 - a) c_{2n} + q c_{2n-2} = 0`` (DLMF 28.14.4),
    so the a values with exponent nu are the eigenvalues of the symmetric
    tridiagonal matrix diag((nu + 2n)^2), off-diagonal q, n = -m..m.
    """
    n = np.arange(-m, m + 1, dtype=float)
    d = (nu + 2.0 * n) ** 2
    e = np.full(2 * m, float(q))
    # Bisection (LAPACK stebz) run to full precision: the default tolerance
    # eps * max|d| ~ 1e-13 would be too coarse for a near a region edge.
    return float(linalg.eigvalsh_tridiagonal(
        d, e, select="i", select_range=(0, 0), lapack_driver="stebz", tol=1e-300)[0])


def _boundaries(q: float) -> tuple[float, float]:
    """(a_0(|q|), b_1(|q|)): lower (beta = 0) and upper (beta = 1) edge of
    the first stability region at this q."""
    q = abs(q)
    m = _hill_size(0.0, q)
    return _hill_lowest(0.0, q, m), _hill_lowest(1.0, q, m)


def _cf_depth(a: float, q: float) -> int:
    # Level k of the fraction has denominator ~ (2k)^2 - a; once that is
    # >> |q| each further level changes the result by a factor ~ q^2/(4k^2)^2.
    return 20 + int(2.0 * math.sqrt(abs(a) + 2.0 * abs(q)))


def _cf_residual(beta: float, a: float, q: float, depth: int) -> float:
    """beta^2 - a - (upward fraction) - (downward fraction); zero at the
    characteristic exponent (March 1997; Leibfried et al. 2003)."""
    q2 = q * q
    tp = 0.0
    tm = 0.0
    # Evaluate both fractions from the tail upwards (backward recurrence).
    for k in range(depth, 0, -1):
        tp = q2 / ((beta + 2.0 * k) ** 2 - a - tp)
        tm = q2 / ((beta - 2.0 * k) ** 2 - a - tm)
    return beta * beta - a - tp - tm


def _check_finite(x: float, name: str, key: str, source: str | None) -> float:
    x = float(x)
    if not math.isfinite(x):
        raise InputError(key, f"{name} must be a finite number, got {x!r}", source)
    return x


def _unstable(a: float, q: float, key: str, source: str | None, why: str = "") -> PhysicsError:
    a0, b1 = _boundaries(q)
    return PhysicsError(
        key,
        f"Mathieu parameters inside the first stability region "
        f"(a_0(|q|) < a < b_1(|q|), i.e. 0 < beta < 1); got a = {a:.9g}, "
        f"q = {q:.9g}, unstable: a_0 = {a0:.9g}, b_1 = {b1:.9g}{why}",
        source,
    )


def _beta_cf_scalar(a: float, q: float, key: str, source: str | None) -> float:
    a = _check_finite(a, "a", key, source)
    q = _check_finite(q, "q", key, source)
    a0, b1 = _boundaries(q)
    if not (a0 < a < b1):
        raise _unstable(a, q, key, source)
    depth = _cf_depth(a, q)
    # Inside the first region no denominator of either fraction vanishes for
    # beta in [0, 1] (they are >= (2k - 1)^2 - a - O(q^2) > 0 since a < b_1 <=
    # 1 - |q| + O(q^2)), and exactly one root lies in (0, 1).
    f0 = _cf_residual(0.0, a, q, depth)
    f1 = _cf_residual(1.0, a, q, depth)
    if not (f0 * f1 < 0.0):
        # Only reachable within rounding of a region edge.
        raise _unstable(a, q, key, source, " (marginal: at the edge within rounding)")
    beta = optimize.brentq(
        _cf_residual, 0.0, 1.0, args=(a, q, depth),
        xtol=1e-16, rtol=4.0 * np.finfo(float).eps, maxiter=200,
    )
    return float(beta)


def _rhs(xi, y, a, q):
    # y = (u1, u1', u2, u2') for the two fundamental solutions
    k = a - 2.0 * q * np.cos(2.0 * xi)
    return (y[1], -k * y[0], y[3], -k * y[2])


def _monodromy_half_trace(a: float, q: float, rtol: float) -> float:
    sol = integrate.solve_ivp(
        _rhs, (0.0, math.pi), np.array([1.0, 0.0, 0.0, 1.0]),
        method="DOP853", rtol=rtol, atol=rtol * 1e-2, args=(a, q),
    )
    if not sol.success:  # pragma: no cover - solver failure is not user input
        raise RuntimeError(f"Mathieu Floquet integration failed: {sol.message}")
    y = sol.y[:, -1]
    return 0.5 * (y[0] + y[3])


def _beta_floquet_scalar(a: float, q: float, key: str, source: str | None,
                         rtol: float) -> float:
    a = _check_finite(a, "a", key, source)
    q = _check_finite(q, "q", key, source)
    a0, b1 = _boundaries(q)
    if not (a0 < a < b1):
        # |Tr M / 2| < 1 also holds in the higher stability regions; the
        # region is identified by its edges a_0, b_1.
        raise _unstable(a, q, key, source)
    half_trace = _monodromy_half_trace(a, q, rtol)
    if not (-1.0 < half_trace < 1.0):
        raise _unstable(a, q, key, source,
                        f" (|Tr M / 2| = {abs(half_trace):.12g} >= 1)")
    return float(math.acos(half_trace) / math.pi)


def _map(fn, a, q):
    a_arr, q_arr = np.broadcast_arrays(np.asarray(a, dtype=float), np.asarray(q, dtype=float))
    if a_arr.ndim == 0:
        return fn(float(a_arr), float(q_arr))
    out = np.empty(a_arr.shape)
    for idx in np.ndindex(a_arr.shape):
        out[idx] = fn(float(a_arr[idx]), float(q_arr[idx]))
    return out


# ---------------------------------------------------------------------------
# public API
# ---------------------------------------------------------------------------

def characteristic_exponent(a, q, *, key: str = "", source: str | None = None):
    r"""Characteristic exponent beta of the Mathieu equation, first stability
    region, from the continued fraction.

    beta is the root in (0, 1) of

    .. math::

        \beta^2 = a + \cfrac{q^2}{(\beta+2)^2 - a - \cfrac{q^2}{(\beta+4)^2 - a - \cdots}}
                    + \cfrac{q^2}{(\beta-2)^2 - a - \cfrac{q^2}{(\beta-4)^2 - a - \cdots}}

    (R.E. March, J. Mass Spectrom. 32, 351 (1997); D. Leibfried et al., Rev.
    Mod. Phys. 75, 281 (2003); equivalent to the recurrence DLMF 28.14.4).
    The fraction is evaluated backward from a depth where it has converged
    to rounding and the root is bracketed on [0, 1] and found with Brent's
    method to ~1e-16 (about 0.3 ms per point). Before that, (a, q) is checked to lie strictly between
    the region edges a_0(|q|) and b_1(|q|), computed as the lowest
    eigenvalues of the Hill matrices for exponents 0 and 1
    (see :func:`stability_boundaries`).

    Parameters
    ----------
    a, q : float or array_like
        Mathieu parameters (dimensionless), broadcast together.
    key, source : str, optional
        Config key path and file, used in the error message.

    Returns
    -------
    beta : float or ndarray
        Characteristic exponent in (0, 1); secular angular frequency
        ``w = beta W / 2``.

    Raises
    ------
    PhysicsError
        If any (a, q) is outside the first stability region.
    InputError
        If a or q is not finite.
    """
    return _map(lambda ai, qi: _beta_cf_scalar(ai, qi, key, source), a, q)


def characteristic_exponent_floquet(a, q, *, rtol: float = 1e-12, key: str = "",
                                    source: str | None = None):
    r"""Characteristic exponent beta from Floquet theory (independent route).

    The two fundamental solutions (u1(0) = 1, u1'(0) = 0; u2(0) = 0,
    u2'(0) = 1) are integrated over one period xi in [0, pi] with
    ``scipy.integrate.solve_ivp`` (DOP853). The monodromy matrix M has
    det M = 1 and

    .. math:: \cos(\pi \beta) = \operatorname{Tr} M / 2

    (Leibfried et al., Rev. Mod. Phys. 75, 281 (2003); DLMF 28.2(iv)).
    In the first stability region beta = arccos(Tr M / 2) / pi. Slower than
    :func:`characteristic_exponent` (~10 ms per point) and less accurate near
    beta = 0 and 1, where arccos amplifies the integration error; it agrees
    with the continued fraction to ~1e-10 in the interior.

    Parameters
    ----------
    a, q : float or array_like
        Mathieu parameters, broadcast together.
    rtol : float
        Relative tolerance of the integration (default 1e-12).
    key, source : str, optional
        Config key path and file, used in the error message.

    Returns
    -------
    beta : float or ndarray

    Raises
    ------
    PhysicsError
        If (a, q) is outside the first stability region or |Tr M / 2| >= 1.
    """
    return _map(lambda ai, qi: _beta_floquet_scalar(ai, qi, key, source, rtol), a, q)


TRANSFER_RTOL = 1e-13


def transfer_matrices(a: float, q: float, xi0, length: float) -> np.ndarray:
    r"""Exact 2 x 2 transfer matrices of the Mathieu equation over one step.

    For u'' + (a - 2 q cos 2 xi) u = 0 (the convention above, xi = W t / 2
    + phase / 2) the matrix M maps (u, du/dxi) at xi0 to (u, du/dxi) at
    xi0 + ``length``; the columns are the two fundamental solutions
    (u(xi0), u'(xi0)) = (1, 0) and (0, 1). Any a, q (also outside the
    stability region, and q = 0) are allowed: the map is that of a linear
    ODE, det M = 1 (Liouville; DLMF 28.2(iv)), and the product of the
    matrices of steps that tile one period pi is the monodromy matrix, Tr =
    2 cos(pi beta) (:func:`characteristic_exponent_floquet`).

    Integrated with ``scipy.integrate.solve_ivp`` (DOP853) at rtol =
    TRANSFER_RTOL (1e-13) and an absolute tolerance 1e-2 rtol on entries of
    order one, all start points xi0 in one vectorised system: each entry
    is accurate to about 1e-13 of the matrix norm for a step of a fraction of
    the period (tests/engine/test_rf_propagator.py checks det M = 1 and the trace
    of the period product against the continued fraction).

    Parameters
    ----------
    a, q : float
        Mathieu parameters.
    xi0 : array_like (P,)
        Start points (rad of xi = W t / 2 + phase / 2).
    length : float
        Step length in xi (W dt / 2).

    Returns
    -------
    (P, 2, 2) ndarray
    """
    xi0 = np.atleast_1d(np.asarray(xi0, dtype=float))
    n = len(xi0)
    a, q, length = float(a), float(q), float(length)

    def rhs(s, y):
        y = y.reshape(n, 4)
        k = a - 2.0 * q * np.cos(2.0 * (xi0 + s))
        return np.column_stack([y[:, 1], -k * y[:, 0], y[:, 3], -k * y[:, 2]]).ravel()

    y0 = np.tile([1.0, 0.0, 0.0, 1.0], n)
    sol = integrate.solve_ivp(rhs, (0.0, length), y0, method="DOP853", rtol=TRANSFER_RTOL,
                              atol=TRANSFER_RTOL * 1e-2)
    if not sol.success:  # pragma: no cover - solver failure is not user input
        raise RuntimeError(f"Mathieu transfer-matrix integration failed: {sol.message}")
    y = sol.y[:, -1].reshape(n, 4)
    # columns: solution 1 (u, u') and solution 2 (u, u')
    return np.stack([np.stack([y[:, 0], y[:, 2]], axis=-1), np.stack([y[:, 1], y[:, 3]], axis=-1)], axis=1)


def stability_boundaries(q):
    r"""Edges of the first stability region at a given q.

    Returns ``(a_0(|q|), b_1(|q|))``: a_0 is the lowest characteristic
    value with exponent beta = 0 (pi-periodic, even), b_1 the lowest with
    beta = 1 (2 pi-periodic, odd) (DLMF 28.2(v)). Computed as the lowest
    eigenvalue of the truncated symmetric tridiagonal Hill matrix
    diag((beta + 2n)^2), off-diagonal q (DLMF 28.14.4). On a = 0 the region
    ends at |q| = 0.908046.

    Parameters
    ----------
    q : float or array_like

    Returns
    -------
    a0, b1 : float or ndarray
    """
    q_arr = np.asarray(q, dtype=float)
    if q_arr.ndim == 0:
        return _boundaries(float(q_arr))
    a0 = np.empty(q_arr.shape)
    b1 = np.empty(q_arr.shape)
    for idx in np.ndindex(q_arr.shape):
        a0[idx], b1[idx] = _boundaries(float(q_arr[idx]))
    return a0, b1


def is_stable(a, q):
    """True where (a, q) is strictly inside the first stability region
    (a_0(|q|) < a < b_1(|q|), i.e. 0 < beta < 1; equivalently |Tr M / 2| < 1
    within that region). Non-finite input gives False.

    Parameters
    ----------
    a, q : float or array_like

    Returns
    -------
    bool or ndarray of bool
    """
    def one(ai, qi):
        if not (math.isfinite(ai) and math.isfinite(qi)):
            return False
        a0, b1 = _boundaries(qi)
        return a0 < ai < b1

    a_arr, q_arr = np.broadcast_arrays(np.asarray(a, dtype=float), np.asarray(q, dtype=float))
    if a_arr.ndim == 0:
        return bool(one(float(a_arr), float(q_arr)))
    out = np.empty(a_arr.shape, dtype=bool)
    for idx in np.ndindex(a_arr.shape):
        out[idx] = one(float(a_arr[idx]), float(q_arr[idx]))
    return out


def lowest_order_beta(a, q):
    r"""Lowest-order characteristic exponent, :math:`\beta \approx \sqrt{a + q^2/2}`,
    valid for |a|, q^2 << 1 (Leibfried et al., Rev. Mod. Phys. 75, 281 (2003)).
    The error in beta^2 is O(q^4): at a = 0, beta^2 = q^2/2 + 25 q^4 / 128 +
    O(q^6) (from DLMF 28.15.1), so beta is underestimated by a relative
    25 q^2 / 128 (2.0e-3 at q = 0.1, 5e-2 at q = 0.5). Returns NaN where
    a + q^2/2 < 0.

    Parameters
    ----------
    a, q : float or array_like

    Returns
    -------
    beta : float or ndarray
    """
    s = np.asarray(a, dtype=float) + 0.5 * np.asarray(q, dtype=float) ** 2
    out = np.where(s >= 0.0, np.sqrt(np.abs(s)), np.nan)
    return float(out) if out.ndim == 0 else out


def secular_frequency_hz(f_drive_hz, a, q, *, key: str = "", source: str | None = None):
    """Secular frequency f = beta(a, q) f_drive / 2 (exact beta).

    Parameters
    ----------
    f_drive_hz : float
        RF drive frequency, Hz (cyclic), > 0.
    a, q : float or array_like
        Mathieu parameters of the axis.
    key, source : str, optional
        For error messages.

    Returns
    -------
    f_secular_hz : float or ndarray
        Hz (cyclic).
    """
    f = _check_finite(f_drive_hz, "f_drive", key, source)
    if f <= 0.0:
        raise InputError(key, f"drive frequency must be > 0 Hz, got {f!r}", source)
    return characteristic_exponent(a, q, key=key, source=source) * (0.5 * f)


def micromotion_amplitude_ratio(q):
    r"""Micromotion amplitude relative to the secular amplitude, lowest order.

    To lowest order in q, u(t) ~ u_1 cos(w t) (1 - (q/2) cos(W t))
    (Leibfried et al., Rev. Mod. Phys. 75, 281 (2003)): the ion oscillates at
    the drive frequency with amplitude |q|/2 times its secular excursion. The
    sign of q only sets the phase of the micromotion relative to the drive.

    Parameters
    ----------
    q : float or array_like

    Returns
    -------
    ratio : float or ndarray
        |q| / 2.
    """
    r = 0.5 * np.abs(np.asarray(q, dtype=float))
    return float(r) if r.ndim == 0 else r


def _a_of_beta(beta: float, q: float) -> float:
    """Inverse problem: the a in the first stability region at which the
    exponent is ``beta``, i.e. the lowest Hill eigenvalue for nu = beta
    (DLMF 28.14.4); increases monotonically from a_0(|q|) to b_1(|q|) as
    beta goes from 0 to 1."""
    return _hill_lowest(beta, abs(q), _hill_size(1.0, q))


def solve_point_trap(f_drive_hz: float, f_secular_hz, *, key: str = "",
                     source: str | None = None):
    r"""Laplace-consistent Mathieu parameters of a point (ring) Paul trap.

    In a quadrupole trap the RF and DC potentials each solve Laplace's
    equation, so with the axial direction z

    .. math:: q_x = q_y = q_r,\quad q_z = -2 q_r, \qquad a_x + a_y + a_z = 0

    (Leibfried et al., Rev. Mod. Phys. 75, 281 (2003)). a_x != a_y (a static
    in-plane quadrupole) allows f_x != f_y. The unknowns are (a_x, a_y, q_r)
    and the equations beta(a_u, q_u) f_drive / 2 = f_u.

    Method. For a given |q| the exponent fixes a uniquely: a_u =
    lambda(beta_u, |q_u|), the lowest eigenvalue of the Hill matrix
    diag((beta_u + 2n)^2), off-diagonal q (DLMF 28.14.4), which lies in
    (a_0, b_1). The Laplace condition then leaves one equation for q_r,

    .. math:: g(q_r) = \lambda(\beta_x, q_r) + \lambda(\beta_y, q_r) + \lambda(\beta_z, 2 q_r) = 0.

    g(0) = sum beta_u^2 > 0, and lambda decreases strictly with |q|
    (Hellmann-Feynman: d lambda / dq = 2 sum c_n c_{n+1} < 0 for the
    sign-alternating lowest eigenvector) without bound, so for any targets
    with 0 < f_u < f_drive/2 there is exactly one solution with q_r > 0.
    It is found with ``scipy.optimize.brentq`` on a bracket grown from the
    lowest-order estimate q_r^2 = sum_u beta_u^2 / 3, and verified by
    recomputing every beta with the continued fraction
    (:func:`characteristic_exponent`, 1e-9 relative). We choose q_r > 0 (the
    sign of q is the RF phase origin; beta depends on |q| only).

    Parameters
    ----------
    f_drive_hz : float
        RF drive frequency, Hz (cyclic).
    f_secular_hz : sequence of 3 floats
        Target secular frequencies (f_x, f_y, f_z), Hz (cyclic), each in
        (0, f_drive/2).
    key, source : str, optional
        Config key path and file, used in error messages.

    Returns
    -------
    a, q : ndarray (3,)
        Mathieu parameters per axis (x, y, z); ``a[2] = -(a[0] + a[1])`` and
        ``q[2] = -2 q[0]`` exactly.

    Raises
    ------
    PhysicsError
        If a secular frequency is >= f_drive/2 (beta >= 1: outside the first
        stability region for any a, q), or so close to 0 or f_drive/2 that the
        solution cannot be verified in double precision. Its attributes
        ``axis`` (0, 1, 2 for x, y, z: the axis at fault) and ``cause``
        (``"above_half_drive"``, ``"at_half_drive"`` or ``"too_weak"``, then
        with ``f_rf_hz``, the lowest-order RF confinement of that axis) let a
        caller word the message in its own terms.
    InputError
        For non-finite, non-positive or wrongly shaped input.
    """
    f_drive = _check_finite(f_drive_hz, "f_drive", key, source)
    if f_drive <= 0.0:
        raise InputError(key, f"drive frequency must be > 0 Hz, got {f_drive!r}", source)
    try:
        f_sec = np.asarray(f_secular_hz, dtype=float)
    except (TypeError, ValueError):
        raise InputError(key, f"three secular frequencies (f_x, f_y, f_z) in Hz, "
                              f"got {f_secular_hz!r}", source) from None
    if f_sec.shape != (3,):
        raise InputError(key, f"three secular frequencies (f_x, f_y, f_z) in Hz, "
                              f"got shape {f_sec.shape}", source)
    if not np.all(np.isfinite(f_sec)) or np.any(f_sec <= 0.0):
        raise InputError(key, f"secular frequencies must be finite and > 0 Hz, "
                              f"got {f_sec.tolist()}", source)
    half = 0.5 * f_drive
    for u, (name, f) in enumerate(zip("xyz", f_sec)):
        if f >= half:
            err = PhysicsError(
                key,
                f"secular frequency f_{name} = {f:.6g} Hz is not below half the drive "
                f"frequency, f_drive/2 = {half:.6g} Hz (the first stability region needs "
                f"beta = 2 f / f_drive < 1); expected a faster drive or a lower f_{name}", source)
            err.axis, err.cause = u, "above_half_drive"
            raise err

    beta_t = f_sec / half
    scale = np.array([1.0, 1.0, 2.0])  # |q_u| / q_r

    def g(qr):
        return sum(_a_of_beta(beta_t[u], scale[u] * qr) for u in range(3))

    lo = 0.0
    hi = 2.0 * math.sqrt(float(np.sum(beta_t ** 2)) / 3.0)
    while g(hi) > 0.0:  # g -> -inf as q_r -> inf, so this ends
        lo, hi = hi, 2.0 * hi
    qr = optimize.brentq(g, lo, hi, xtol=1e-15, rtol=4.0 * np.finfo(float).eps, maxiter=200)

    ax = _a_of_beta(beta_t[0], qr)
    ay = _a_of_beta(beta_t[1], qr)
    a = np.array([ax, ay, -(ax + ay)])
    q = np.array([qr, qr, -2.0 * qr])
    try:
        beta = characteristic_exponent(a, q)
    except PhysicsError:
        beta = np.full(3, np.nan)
    mismatch = np.abs(beta / beta_t - 1.0)
    if not np.all(mismatch < 1e-9):
        raise _unresolved(f_drive, f_sec, a, q, mismatch, key, source)
    return a, q


def _unresolved(f_drive, f_sec, a, q, mismatch, key, source) -> PhysicsError:
    """The error of a point trap that double precision cannot set: one axis
    so weak that its beta^2 = a + q^2/2 + ... is the residue of cancelling
    its RF confinement against the static defocusing that Laplace's equation
    and the other axes impose, or so close to f_drive/2 that beta = 1 is not
    resolved. Names that axis (``err.axis``) and the numbers that matter."""
    u = int(np.nanargmax(np.where(np.isfinite(mismatch), mismatch, np.inf)))
    name = "xyz"[u]
    f = float(f_sec[u])
    # lowest order: w^2 = (W/2)^2 (a + q^2/2), the RF part |q| W / (2 sqrt 2)
    f_rf = abs(float(q[u])) * f_drive / (2.0 * math.sqrt(2.0))
    if f < 0.25 * f_drive:
        cause = "too_weak"
        text = (f"the trap is too weak for this drive along {name}: f_{name} = {f:.4g} Hz at f_drive = {f_drive:.4g} Hz "
                f"leaves {(f / f_rf) ** 2:.1e} of the {f_rf:.4g} Hz RF confinement after the static defocusing "
                f"(a cancellation double precision cannot resolve)")
    else:
        cause = "at_half_drive"
        text = (f"f_{name} = {f:.10g} Hz is too close to half the drive frequency ({0.5 * f_drive:.10g} Hz) for "
                f"double precision; expected a lower f_{name} or a faster drive")
    err = PhysicsError(key, text, source)
    err.axis, err.cause, err.f_rf_hz = u, cause, f_rf
    return err
