r"""Coherence of a planar quantum rotor under angular-momentum diffusion.

A rotor prepared in a superposition of two angular-momentum branches that
differ by ``dl`` quanta (a Ramsey sequence) loses contrast when noise
torques make its angular momentum diffuse. This module gives the exact
contrast for pure diffusion (no friction) from the master equation of
rotational diffusion, B.A. Stickler, B. Schrinski, K. Hornberger,
Phys. Rev. Lett. 121, 040401 (2018), its short-time classical limit, the
spin-echo variant, and a direct numerical integration of the master
equation as a reference.

Units
-----
Times in s, the moment of inertia in kg m^2. The diffusion constant is
given in quanta, ``D_hbar2_per_s = D / hbar^2`` in hbar^2 / s, where ``D``
(SI, (J s)^2 / s) is defined by ``<(L(t) - L(0))^2> = 2 D t``; convert a
diffusion constant in SI with ``D_hbar2_per_s = D_SI / hbar**2``.

Model
-----
Planar rigid rotor, ``H = hbar^2 Lhat^2 / (2 I)`` with integer ``L``
(units of hbar) and the angle ``phi`` conjugate to it. A noise potential
``V(t) cos(q phi) + W(t) sin(q phi)`` with two independent white
quadratures of equal strength (e.g. an order-``q`` field multipole of
random phase acting on the crystal) gives, after averaging over the noise,
the Lindblad generator

.. math::

    \mathcal{D}\rho = \gamma_q \left( e^{i q\phi}\rho e^{-i q\phi}
        + e^{-i q\phi}\rho e^{i q\phi} - 2\rho \right)
      = -\gamma_q \left( [\cos q\phi,[\cos q\phi,\rho]]
        + [\sin q\phi,[\sin q\phi,\rho]] \right),

a random kick of ``+q`` or ``-q`` quanta, each at rate ``gamma_q``
(``q`` = ``kick_quanta``). Then ``d<L^2>/dt = 2 q^2 gamma_q`` (quanta^2/s),
so ``gamma_q = D_hbar2_per_s / q^2``. In the angle representation
``rho(phi, phi')`` the generator multiplies by
``-2 gamma_q (1 - cos q(phi - phi'))``, whose small-angle form
``-(D/hbar^2) (phi - phi')^2`` is the double commutator
``-(D/hbar^2) [phi, [phi, rho]]`` of continuous angular-momentum
diffusion. The angle operator itself is not defined on the circle; the
2 pi-periodic form above is the one used for planar rotors by Stickler et
al. (from memory). The difference matters: the double commutator with
``phi`` gives a pure ``t^3`` law at all times, the periodic form turns over
to a linear decay (below). Friction and the finite temperature of the
noise bath (the other terms of Stickler et al.) are left out: pure
diffusion.

Derivation (Ramsey)
-------------------
1. Coherences. Let ``c_m(t) = <m + dl| rho |m>``. Both the commutator with
   ``H`` and the kicks preserve ``L - L'``, so the ``c_m`` evolve among
   themselves:

   ``dc_m/dt = -i (a + b m) c_m + gamma_q (c_{m-q} + c_{m+q} - 2 c_m)``

   with ``(E_{m+dl} - E_m)/hbar = a + b m``, ``a = hbar dl^2 / (2 I)``,
   ``b = hbar dl / I`` (rad/s; ``b`` is the relative angular velocity of
   the two branches).
2. Signal. The Ramsey signal is the total coherence between the branches,
   ``S(t) = sum_m c_m = Tr(rho e^{-i dl phi})`` (the visibility of the
   ``dl``-fold angular interference pattern; equally the qubit coherence
   when the branches are tagged by a qubit). The contrast is
   ``C(t) = |S(t)| / |S(0)|``; without diffusion ``C = 1``.
3. Generating function ``G(theta, t) = sum_m c_m e^{i m theta}``, with
   ``S = G(0, t)``. Step 1 becomes the first-order equation

   ``dG/dt + b dG/dtheta = [-i a - 2 gamma_q (1 - cos q theta)] G``.

4. Characteristics ``theta(s) = b (s - t)`` end at ``theta = 0`` at time
   ``t``:

   ``G(0, t) = G(-b t, 0) e^{-i a t}
   exp(-2 gamma_q int_0^t [1 - cos(q b u)] du)``.

   For the initial state ``(|L0> + |L0 + dl>)/sqrt 2``, ``c_m(0)`` is
   nonzero only at ``m = L0`` and ``|G(-b t, 0)| = |S(0)|``. Hence the
   exact result

   .. math::

       C_R(t) = \exp\left[-\frac{2 D}{q^2}\left(t
                 - \frac{\sin(q b t)}{q b}\right)\right],
       \qquad b = \hbar\,dl / I,\quad D = D_{\hbar^2/s}.

5. Limits. For ``q b t << 1``, ``t - sin(q b t)/(q b) = q^2 b^2 t^3/6``
   and ``C_R = exp(-dl^2 D_SI t^3 / (3 I^2))``: the classical Gaussian
   phase-diffusion law (the phase ``b int L dt`` of a random walk with
   ``<dL^2> = 2 D t`` has variance ``2 b^2 D t^3 / 3``). For
   ``q b t >> 1``, ``C_R -> exp(-2 D t / q^2)``: every kick (total rate
   ``2 gamma_q``) imprints a phase ``q b (t - s) >> 1`` and destroys the
   coherence it hits. The turnover is at ``t ~ I / (hbar q |dl|)``.
   The same closed form follows from a classical rotor kicked by ``+-q``
   quanta at Poisson times (Campbell's theorem), which the tests use.

   A spread of ``L0`` in the initial state adds the inhomogeneous factor
   ``|sum_L0 p(L0) e^{-i b L0 t}|`` (dephasing), which is not included
   here; a spin echo removes it.

Spin echo
---------
A pi pulse at ``t/2`` swaps the branches, e.g. a qubit flip that also
transfers ``dl`` quanta: ``c_m -> conj(c_m)``, i.e.
``G(theta) -> conj(G(-theta))``. Following the characteristics through
both halves (the second half ends at ``theta = 0``, the first at
``theta = b t/2``) the deterministic phases and any ``L0`` dependence
cancel and

.. math::

    C_E(t) = \exp\left[-\frac{4 D}{q^2}\left(\frac{t}{2}
              - \frac{\sin(q b t/2)}{q b}\right)\right] = C_R(t/2)^2 .

At short times ``-ln C_E = dl^2 D_SI t^3 / (12 I^2)``, a quarter of the
Ramsey exponent; at long times the echo gains nothing (``2 D t / q^2``).

Symmetric crystals
------------------
For a regular N-ion crystal of identical ions, ``L`` lives on a ladder
with spacing N (:func:`mdrotor.physics.rotor.allowed_L_ladder`), so both ``dl``
and ``kick_quanta`` are multiples of N; an order-n multipole torque kicks
by ``q = n``.
"""

from __future__ import annotations

import numpy as np

from mdrotor.errors import InputError
from mdrotor.physics.constants import HBAR

__all__ = [
    "decay_exponent",
    "ramsey_contrast",
    "echo_contrast",
    "short_time_contrast",
    "short_time_validity_s",
    "coherence_time_s",
    "coherence_budget",
    "master_equation_coherence",
]

_SRC = "mdrotor.physics.coherence"
_KINDS = ("ramsey", "echo")


# --------------------------------------------------------------------------
# input checks
# --------------------------------------------------------------------------
def _err(key, expected, func):
    return InputError(key, expected, f"{_SRC}.{func}")


def _times(t_s, func) -> np.ndarray:
    t = np.asarray(t_s, dtype=float)
    if not np.all(np.isfinite(t)) or np.any(t < 0):
        raise _err("t_s", f"finite times >= 0 s, got {t_s!r}", func)
    return t


def _nonneg(x, key, func) -> float:
    try:
        v = float(x)
    except (TypeError, ValueError):
        raise _err(key, f"a finite number >= 0, got {x!r}", func) from None
    if not np.isfinite(v) or v < 0:
        raise _err(key, f"a finite number >= 0, got {x!r}", func)
    return v


def _positive(x, key, func) -> float:
    try:
        v = float(x)
    except (TypeError, ValueError):
        raise _err(key, f"a finite number > 0, got {x!r}", func) from None
    if not np.isfinite(v) or v <= 0:
        raise _err(key, f"a finite number > 0, got {x!r}", func)
    return v


def _int(x, key, func, minimum=None) -> int:
    try:
        v = float(x)
    except (TypeError, ValueError):
        raise _err(key, f"an integer, got {x!r}", func) from None
    if not np.isfinite(v) or v != round(v):
        raise _err(key, f"an integer, got {x!r}", func)
    v = int(round(v))
    if minimum is not None and v < minimum:
        raise _err(key, f"an integer >= {minimum}, got {x!r}", func)
    return v


def _kind(kind, func) -> str:
    if kind not in _KINDS:
        raise _err("kind", f"one of {', '.join(_KINDS)}, got {kind!r}", func)
    return kind


def _contrast(c, key, func) -> float:
    try:
        v = float(c)
    except (TypeError, ValueError):
        raise _err(key, f"a contrast strictly between 0 and 1, got {c!r}", func) from None
    if not (0.0 < v < 1.0):
        raise _err(key, f"a contrast strictly between 0 and 1, got {c!r}", func)
    return v


def _out(x):
    x = np.asarray(x)
    return float(x) if x.ndim == 0 else x


# --------------------------------------------------------------------------
# numerics of the closed form
# --------------------------------------------------------------------------
def _one_minus_sinc(x):
    """``1 - sin(x)/x`` without cancellation at small ``x`` (0 at x = 0)."""
    x = np.abs(np.asarray(x, dtype=float))
    out = np.empty_like(x)
    small = x < 0.1
    xs2 = x[small] ** 2
    # Taylor series 1 - sin x / x = x^2/3! - x^4/5! + x^6/7! - x^8/9! + x^10/11!;
    # the first omitted term is < 1e-19 relative for x < 0.1.
    out[small] = xs2 * (1 / 6 - xs2 * (1 / 120 - xs2 * (1 / 5040 - xs2 * (
        1 / 362880 - xs2 / 39916800))))
    xl = x[~small]
    out[~small] = 1.0 - np.sin(xl) / xl
    return out


def _x_minus_sin(x):
    return x * _one_minus_sinc(x)


def _invert_x_minus_sin(c: float) -> float:
    """Solve ``x - sin x = c`` for ``x >= 0`` (monotonic, ``c >= 0``)."""
    from scipy.optimize import brentq

    if c == 0:
        return 0.0
    if c < 1e-30:
        # x - sin x = x^3/6 (1 - x^2/20 + ...): x = (6 c)^(1/3) to a relative
        # (6c)^(2/3)/60 < 1e-21, where bracketing would run out of iterations
        # (x ~ 1e-100 for D ~ 1e300 hbar^2/s)
        return float(np.cbrt(6.0 * c))
    f = lambda x: float(_x_minus_sin(x)) - c  # noqa: E731
    # x - sin x >= x - 1, so the root lies below c + 1.
    return brentq(f, 0.0, c + 1.0, xtol=1e-300, rtol=4e-15, maxiter=500)


def _rates(dl, D, I, kick_quanta):
    """``(b, q, gamma_q)``: relative angular velocity (rad/s), kick size, kick rate (1/s)."""
    b = HBAR * dl / I
    q = kick_quanta
    return b, q, D / q**2


# --------------------------------------------------------------------------
# public API
# --------------------------------------------------------------------------
def decay_exponent(t_s, dl: int, D_hbar2_per_s: float, I_kg_m2: float, *,
                   kind: str = "ramsey", kick_quanta: int = 1):
    r"""Exact decay exponent ``-ln C(t)`` under pure angular-momentum diffusion.

    Ramsey: ``(2 D / q^2) [t - sin(q b t) / (q b)]``;
    echo: ``(4 D / q^2) [t/2 - sin(q b t/2) / (q b)]``; ``b = hbar dl / I``,
    ``D`` in hbar^2/s, ``q`` = ``kick_quanta``. Derivation in the module
    docstring (master equation of B.A. Stickler, B. Schrinski,
    K. Hornberger, Phys. Rev. Lett. 121, 040401 (2018)).

    Parameters
    ----------
    t_s : float or array_like
        Free-evolution time, s (total time for the echo), >= 0.
    dl : int
        Angular-momentum difference of the two branches, quanta.
    D_hbar2_per_s : float
        Angular-momentum diffusion constant, hbar^2/s (``<dL^2> = 2 D t``).
    I_kg_m2 : float
        Moment of inertia, kg m^2.
    kind : {"ramsey", "echo"}
        Sequence; "echo" has a pi pulse swapping the branches at ``t/2``.
    kick_quanta : int, optional
        Quanta per elementary kick ``q`` (angle dependence ``e^{+-i q phi}``
        of the noise); 1 for a generic torque, ``n`` for an order-n
        multipole.

    Returns
    -------
    float or ndarray
        ``-ln C`` (dimensionless), same shape as ``t_s``.
    """
    func = "decay_exponent"
    t = _times(t_s, func)
    dl = _int(dl, "dl", func)
    D = _nonneg(D_hbar2_per_s, "D_hbar2_per_s", func)
    I = _positive(I_kg_m2, "I_kg_m2", func)
    q = _int(kick_quanta, "kick_quanta", func, minimum=1)
    kind = _kind(kind, func)
    b, q, gam = _rates(dl, D, I, q)
    x = q * b * t if kind == "ramsey" else 0.5 * q * b * t
    # t (1 - sinc x) = t - sin(x)/(q b) (Ramsey); same with t/2 doubled (echo)
    return _out(2.0 * gam * t * _one_minus_sinc(x))


def ramsey_contrast(t_s, dl: int, D_hbar2_per_s: float, I_kg_m2: float, *,
                    kick_quanta: int = 1):
    r"""Ramsey contrast of branches ``dl`` apart under pure angular-momentum diffusion.

    .. math::

        C_R(t) = \exp\left[-\frac{2D}{q^2}\left(t - \frac{\sin(q b t)}{q b}
                 \right)\right], \quad b = \hbar\,dl/I,

    exact for the master equation of rotational diffusion (B.A. Stickler,
    B. Schrinski, K. Hornberger, Phys. Rev. Lett. 121, 040401 (2018));
    derivation in the module docstring. Short times: ``exp(-dl^2 D_SI t^3 /
    (3 I^2))``; long times ``exp(-2 D t / q^2)``.

    Parameters
    ----------
    t_s : float or array_like
        Free-evolution time, s (>= 0).
    dl : int
        Angular-momentum difference of the branches, quanta.
    D_hbar2_per_s : float
        Diffusion constant ``D_SI / hbar^2``, hbar^2/s (``<dL^2> = 2 D t``).
    I_kg_m2 : float
        Moment of inertia, kg m^2.
    kick_quanta : int, optional
        Quanta per elementary kick, see :func:`decay_exponent`.

    Returns
    -------
    float or ndarray
        Contrast in [0, 1], relative to the noiseless case.
    """
    return _out(np.exp(-np.asarray(decay_exponent(
        t_s, dl, D_hbar2_per_s, I_kg_m2, kind="ramsey", kick_quanta=kick_quanta))))


def echo_contrast(t_s, dl: int, D_hbar2_per_s: float, I_kg_m2: float, *,
                  kick_quanta: int = 1):
    r"""Spin-echo contrast (pi pulse swapping the branches at ``t/2``).

    .. math::

        C_E(t) = \exp\left[-\frac{4D}{q^2}\left(\frac t2 - \frac{\sin(q b t/2)}
                 {q b}\right)\right] = C_R(t/2)^2,

    derivation in the module docstring. Short times:
    ``exp(-dl^2 D_SI t^3 / (12 I^2))``, a quarter of the Ramsey exponent.
    The pulse is taken as instantaneous and perfect.

    Parameters
    ----------
    t_s : float or array_like
        Total sequence time, s (>= 0).
    dl, D_hbar2_per_s, I_kg_m2, kick_quanta
        As in :func:`ramsey_contrast`.

    Returns
    -------
    float or ndarray
        Contrast in [0, 1].
    """
    return _out(np.exp(-np.asarray(decay_exponent(
        t_s, dl, D_hbar2_per_s, I_kg_m2, kind="echo", kick_quanta=kick_quanta))))


def short_time_contrast(t_s, dl: int, D_hbar2_per_s: float, I_kg_m2: float, *,
                        kind: str = "ramsey"):
    r"""Classical Gaussian phase-diffusion contrast (the ``t^3`` law).

    Ramsey: ``exp(-dl^2 D_SI t^3 / (3 I^2))`` with ``D_SI = hbar^2 D``
    (B.A. Stickler, B. Schrinski, K. Hornberger, Phys. Rev. Lett. 121,
    040401 (2018)); echo: ``exp(-dl^2 D_SI t^3 / (12 I^2))``. Valid below
    :func:`short_time_validity_s`; beyond, it overestimates the decay.

    Parameters
    ----------
    t_s : float or array_like
        Time, s (>= 0).
    dl : int
        Angular-momentum difference, quanta.
    D_hbar2_per_s : float
        Diffusion constant, hbar^2/s.
    I_kg_m2 : float
        Moment of inertia, kg m^2.
    kind : {"ramsey", "echo"}

    Returns
    -------
    float or ndarray
        Contrast.
    """
    func = "short_time_contrast"
    t = _times(t_s, func)
    dl = _int(dl, "dl", func)
    D = _nonneg(D_hbar2_per_s, "D_hbar2_per_s", func)
    I = _positive(I_kg_m2, "I_kg_m2", func)
    kind = _kind(kind, func)
    b = HBAR * dl / I
    expo = D * b**2 * t**3 / 3.0
    if kind == "echo":
        expo = expo / 4.0
    return _out(np.exp(-expo))


def short_time_validity_s(dl: int, I_kg_m2: float, *, rel_tol: float = 0.01,
                          kind: str = "ramsey", kick_quanta: int = 1) -> float:
    r"""Time up to which the ``t^3`` law holds to ``rel_tol`` in the exponent.

    Defined as the time where the exact exponent (:func:`decay_exponent`)
    falls below the ``t^3`` exponent (:func:`short_time_contrast`) by the
    fraction ``rel_tol``. Their ratio depends only on ``x = q |b| t``
    (Ramsey) or ``x = q |b| t / 2`` (echo), ``b = hbar dl / I``:
    ``R(x) = 6 (x - sin x) / x^3 = 1 - x^2/20 + ...``, so for
    ``rel_tol = 1%`` ``x = 0.4477`` and ``t = 0.4477 I / (hbar q |dl|)``
    (Ramsey). Independent of ``D``.

    Parameters
    ----------
    dl : int
        Angular-momentum difference, quanta (``0`` gives ``inf``).
    I_kg_m2 : float
        Moment of inertia, kg m^2.
    rel_tol : float, optional
        Relative deviation of the exponent, in (0, 0.9).
    kind : {"ramsey", "echo"}
    kick_quanta : int, optional
        Quanta per kick, see :func:`decay_exponent`.

    Returns
    -------
    float
        Time, s.
    """
    from scipy.optimize import brentq

    func = "short_time_validity_s"
    dl = _int(dl, "dl", func)
    I = _positive(I_kg_m2, "I_kg_m2", func)
    q = _int(kick_quanta, "kick_quanta", func, minimum=1)
    kind = _kind(kind, func)
    tol = float(rel_tol)
    if not (0.0 < tol < 0.9):
        raise _err("rel_tol", f"a number in (0, 0.9), got {rel_tol!r}", func)
    if dl == 0:
        return float("inf")

    def deviation(x):
        return 1.0 - 6.0 * float(_x_minus_sin(x)) / x**3 - tol

    # R(x) decreases from 1 (x -> 0) to 6/x^2 (x >> 1): 1 - R(30) > 0.99.
    x = brentq(deviation, 1e-3 * np.sqrt(tol), 30.0, xtol=1e-15, rtol=4e-15)
    qb = q * HBAR * abs(dl) / I
    return float(x / qb if kind == "ramsey" else 2.0 * x / qb)


def coherence_time_s(dl: int, D_hbar2_per_s: float, I_kg_m2: float,
                     contrast: float = float(np.exp(-1.0)), kind: str = "ramsey", *,
                     kick_quanta: int = 1) -> float:
    r"""Time at which the contrast has fallen to ``contrast``.

    Solves ``decay_exponent(t) = -ln(contrast)``. With
    ``x = q |b| t`` (Ramsey) or ``x = q |b| t / 2`` (echo) the exponent is
    ``kappa (x - sin x)`` with ``kappa = 2 D / (q^3 |b|)`` (Ramsey) or
    ``4 D / (q^3 |b|)`` (echo), monotonic in ``x``; the root is found with
    :func:`scipy.optimize.brentq`. In the ``t^3`` regime the result scales
    as ``D^(-1/3)``, in the linear regime as ``q^2 / (2 D)``.

    Parameters
    ----------
    dl : int
        Angular-momentum difference, quanta.
    D_hbar2_per_s : float
        Diffusion constant, hbar^2/s.
    I_kg_m2 : float
        Moment of inertia, kg m^2.
    contrast : float, optional
        Target contrast in (0, 1), default ``1/e``.
    kind : {"ramsey", "echo"}
    kick_quanta : int, optional
        Quanta per kick, see :func:`decay_exponent`.

    Returns
    -------
    float
        Time, s; ``inf`` if ``D = 0`` or ``dl = 0`` (no decay).
    """
    func = "coherence_time_s"
    dl = _int(dl, "dl", func)
    D = _nonneg(D_hbar2_per_s, "D_hbar2_per_s", func)
    I = _positive(I_kg_m2, "I_kg_m2", func)
    c = _contrast(contrast, "contrast", func)
    q = _int(kick_quanta, "kick_quanta", func, minimum=1)
    kind = _kind(kind, func)
    if D == 0 or dl == 0:
        return float("inf")
    qb = q * HBAR * abs(dl) / I
    kappa = (2.0 if kind == "ramsey" else 4.0) * D / (q**2 * qb)
    x = _invert_x_minus_sin(-np.log(c) / kappa)
    return float(x / qb if kind == "ramsey" else 2.0 * x / qb)


def coherence_budget(target_contrast: float, t_s, dl: int, I_kg_m2: float, *,
                     kind: str = "ramsey", kick_quanta: int = 1):
    r"""Largest diffusion constant that still leaves ``target_contrast`` at ``t``.

    The exponent is linear in ``D``, so
    ``D_max = -ln(target) / (decay_exponent(t) / D)``. Useful with ``t`` the
    exchange or revival time (:mod:`mdrotor.physics.rotor`). Converting ``D`` to a
    noise spectral density is done in the noise module.

    Parameters
    ----------
    target_contrast : float
        Contrast to keep, in (0, 1).
    t_s : float or array_like
        Time, s (>= 0).
    dl : int
        Angular-momentum difference, quanta.
    I_kg_m2 : float
        Moment of inertia, kg m^2.
    kind : {"ramsey", "echo"}
    kick_quanta : int, optional
        Quanta per kick, see :func:`decay_exponent`.

    Returns
    -------
    float or ndarray
        ``D_max`` in hbar^2/s (``inf`` where there is no decay: ``t = 0``
        or ``dl = 0``).
    """
    func = "coherence_budget"
    c = _contrast(target_contrast, "target_contrast", func)
    per_D = np.asarray(decay_exponent(t_s, dl, 1.0, I_kg_m2, kind=kind,
                                      kick_quanta=kick_quanta))
    with np.errstate(divide="ignore"):
        d_max = np.where(per_D > 0, -np.log(c) / np.where(per_D > 0, per_D, 1.0), np.inf)
    return _out(d_max)


def master_equation_coherence(t_s, dl: int, D_hbar2_per_s: float, I_kg_m2: float,
                              L0: int, L_cut: int, *, kind: str = "ramsey",
                              kick_quanta: int = 1):
    r"""Contrast from direct integration of the master equation (reference).

    Integrates, in the truncated basis ``L = L0 + min(0, dl) - L_cut ...
    L0 + max(0, dl) + L_cut``, the ``up-down`` coherence block
    ``X = <up| rho |down>`` of a qubit-tagged rotor with
    ``H = hbar^2 L^2 / (2 I)`` (qubit energy removed in its rotating frame)
    and the kick generator of the module docstring,

    ``dX/dt = -i [H, X] / hbar + gamma_q (U X U^+ + U^+ X U - 2 X)``,

    ``U |L> = |L + q>``, ``gamma_q = D / q^2`` (B.A. Stickler, B. Schrinski,
    K. Hornberger, Phys. Rev. Lett. 121, 040401 (2018)). Because ``H`` and
    the kicks do not act on the qubit the master equation is block diagonal
    and ``X`` evolves on its own. Start ``X = |L0 + dl><L0|``; signal
    ``sum_m X_{m+dl, m}``, normalised to its initial value. For the echo the
    pi pulse ``|down, L> -> |up, L + dl>``, ``|up, L> -> |down, L - dl>`` at
    ``t/2`` maps ``X -> S X^+ S`` with ``S |L> = |L + dl>``. The full
    ``n x n`` block is propagated with :func:`scipy.sparse.linalg.expm_multiply`
    (row-major vectorisation, ``vec(A X B) = (A kron B^T) vec(X)``).

    Truncation drops kicks leaving the basis; choose ``L_cut`` a few times
    ``sqrt(2 D t)`` plus a few ``q``. Cost grows with ``(L0 + L_cut)^2 hbar t
    / I``: keep ``L0`` small (the contrast does not depend on it).

    Parameters
    ----------
    t_s : float or array_like
        Times, s (>= 0).
    dl : int
        Angular-momentum difference, quanta.
    D_hbar2_per_s : float
        Diffusion constant, hbar^2/s.
    I_kg_m2 : float
        Moment of inertia, kg m^2.
    L0 : int
        Lower branch, quanta.
    L_cut : int
        Basis margin beyond the two branches, quanta (>= 1).
    kind : {"ramsey", "echo"}
    kick_quanta : int, optional
        Quanta per kick.

    Returns
    -------
    float or ndarray
        Contrast, same shape as ``t_s``.
    """
    import scipy.sparse as sp
    from scipy.sparse.linalg import expm_multiply

    func = "master_equation_coherence"
    t = _times(t_s, func)
    dl = _int(dl, "dl", func)
    D = _nonneg(D_hbar2_per_s, "D_hbar2_per_s", func)
    I = _positive(I_kg_m2, "I_kg_m2", func)
    L0 = _int(L0, "L0", func)
    L_cut = _int(L_cut, "L_cut", func, minimum=1)
    q = _int(kick_quanta, "kick_quanta", func, minimum=1)
    kind = _kind(kind, func)

    L_lo = L0 + min(0, dl) - L_cut
    L = np.arange(L_lo, L0 + max(0, dl) + L_cut + 1)
    n = L.size
    w = HBAR * L.astype(float) ** 2 / (2.0 * I)          # E_L / hbar, 1/s
    one = sp.identity(n, format="csr")
    U = sp.eye(n, k=-q, format="csr")                       # U[i+q, i] = 1
    gam = D / q**2
    A = (-1j * (sp.kron(sp.diags(w), one) - sp.kron(one, sp.diags(w)))
         + gam * (sp.kron(U, U) + sp.kron(U.T, U.T) - 2.0 * sp.identity(n * n))).tocsr()
    S = sp.eye(n, k=-dl, format="csr")                      # S[i+dl, i] = 1

    X0 = np.zeros((n, n), dtype=complex)
    X0[L0 + dl - L_lo, L0 - L_lo] = 1.0

    def signal(X):
        return np.trace(X, offset=-dl)

    s0 = signal(X0)
    flat_t = t.ravel()
    out = np.empty(flat_t.size)
    if kind == "ramsey":
        order = np.argsort(flat_t)
        v = X0.ravel()
        t_prev = 0.0
        for idx in order:
            dt = flat_t[idx] - t_prev
            if dt > 0:
                v = expm_multiply(A * dt, v)
            t_prev = flat_t[idx]
            out[idx] = abs(signal(v.reshape(n, n)) / s0)
    else:
        for idx, tt in enumerate(flat_t):
            v = expm_multiply(A * (0.5 * tt), X0.ravel())
            Xh = v.reshape(n, n)
            Xp = S @ (S.T @ Xh).conj().T                    # S X^+ S (S real)
            v = expm_multiply(A * (0.5 * tt), np.ascontiguousarray(Xp).ravel())
            out[idx] = abs(signal(v.reshape(n, n)) / s0)
    return _out(out.reshape(t.shape))
