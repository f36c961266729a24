"""Electrode voltages for target multipoles, within the voltage limits.

Potentials are linear in the electrode voltages, so the multipole
coefficients at the trap point are C = M V with M the per-volt table of
:func:`mdrotor.electrodes.harmonic_fit.fit_multipoles` (dc channels only; rf
electrodes sit at dc ground). Targets and unwanted terms are compared as
the rms potential they make on a sphere of the crystal's radius rho,
|C_lm| rho^l s_lm (s_lm the rms of S_lm on the unit sphere): this puts a
field, a curvature and a pinning multipole on one scale, the one the ions
feel.

Static solve: minimise

    sum_targets (w_t (C_j - t_j) s_j rho^l)^2 + sum_others (C_j s_j rho^l)^2
    + (lambda V_e / L_e)^2

over |V_e| <= L_e with :func:`scipy.optimize.lsq_linear` (bounded-variable
least squares). The large target weight w_t makes the targets nearly hard
constraints; the other terms (l = 1..order, except ``free`` ones) are
pushed to zero; the small lambda picks the smallest voltages among equal
solutions.

Rotating order-n pinning, Phi_n = Re[c (x + i y)^n e^{-i n theta}]: with
V_e(theta) = s_e + p_e cos(n theta) + q_e sin(n theta)
          = s_e + A_e cos(n theta - phi_e),
the sectoral coefficient k_n = C_nn - i C_n-n must equal c e^{-i n theta}
for all theta, i.e. C_nn = c, C_n-n = 0 from the cosine voltages p and
C_nn = 0, C_n-n = c from the sine voltages q, while every other term of
p and q stays small. The limit is |s_e| + A_e <= L_e, a disc for (p_e,
q_e); lsq_linear handles boxes only, so the solve first uses the box
|p_e|, |q_e| <= L_e - |s_e| (a relaxation: when its solution lies in the
discs it is the optimum) and otherwise boxes inscribed in the discs,
(L cos b_e, L sin b_e), with the corner angle b_e taken from the previous
solution's phase, for a few rounds, keeping the best feasible result.
Every returned plan respects the limits at every phase.

Caution: the voltages must stay within the trap's rated limits and the
lab's safety rules; the solver only knows the limits in the layout file.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np
from scipy.optimize import lsq_linear

from mdrotor.electrodes.harmonic_fit import MultipoleTable, fit_multipoles
from mdrotor.errors import InputError

__all__ = ["StaticSolution", "RotatingPlan", "solve_static", "solve_rotating", "lacking_terms", "CAUTION"]

CAUTION = ("Voltages and RF amplitudes must stay within the trap's rated limits and the lab's safety rules "
           "(trap electrodes carry high voltage and RF); check every waveform against them before applying it.")

#: Weight of target rows relative to unwanted rows (near-hard targets).
TARGET_WEIGHT = 1e3
#: Weight of the voltage regulariser (in units of the target potential).
REGULARIZATION = 1e-6


def _prepare(layout, table, channels, crystal_radius_m):
    if table is None:
        table = fit_multipoles(layout)
    if not isinstance(table, MultipoleTable) or tuple(table.names) != tuple(layout.channels):
        raise InputError("table", "expected a per-channel MultipoleTable of this layout", layout.source)
    if channels is None:
        use = list(layout.dc_channels)
    else:
        use = []
        for c in channels:
            if c not in layout.channels:
                raise InputError(f"channels.{c}", f"unknown channel; expected one of {', '.join(layout.channels)}", layout.source)
            i = layout.channels.index(c)
            if layout.channel_roles[i] != "dc":
                raise InputError(f"channels.{c}", "is an rf channel; expected dc channels only", layout.source)
            use.append(i)
    if not use:
        raise InputError("channels", "expected at least one dc channel to solve for", layout.source)
    rho = table.radius_m if crystal_radius_m is None else float(crystal_radius_m)
    if not rho > 0:
        raise InputError("crystal_radius", "expected a positive radius in m", layout.source)
    w = np.array([table.term_rms[j] * rho ** l for j, (l, m) in enumerate(table.terms)])
    return table, use, rho, w


def _rows(table, use, limits, w, targets, scale, suppress_order, free, target_weight, reg):
    """Scaled least-squares system A x = b for x = V / L on the channels ``use``."""
    M = table.coeffs[use].T * limits[None, :]  # (n_terms, n_use): C per unit x
    rows, rhs, kinds = [], [], []
    for j, (l, m) in enumerate(table.terms):
        if l == 0 or l > suppress_order or (l, m) in free:
            if (l, m) not in targets:
                continue
        if (l, m) in targets:
            rows.append(target_weight * w[j] * M[j] / scale)
            rhs.append(target_weight * w[j] * targets[(l, m)] / scale)
            kinds.append(("target", j))
        else:
            rows.append(w[j] * M[j] / scale)
            rhs.append(0.0)
            kinds.append(("unwanted", j))
    n = len(use)
    rows.append(reg * np.eye(n))
    rhs.extend([0.0] * n)
    A = np.vstack([np.atleast_2d(r) for r in rows])
    return A, np.asarray(rhs, dtype=float)


def _lsq(A, b, bound):
    lo = -np.asarray(bound, dtype=float)
    hi = np.asarray(bound, dtype=float)
    fixed = hi <= 0
    x = np.zeros(A.shape[1])
    if np.all(fixed):
        return x
    sol = lsq_linear(A[:, ~fixed], b, bounds=(lo[~fixed], hi[~fixed]), method="bvls", tol=1e-14, max_iter=2000)
    x[~fixed] = sol.x
    return x


def _check_targets(targets, table, source):
    out = {}
    for key, val in dict(targets).items():
        try:
            l, m = (int(v) for v in key)
        except (TypeError, ValueError):
            raise InputError("targets", f"expected keys (l, m), got {key!r}", source) from None
        if (l, m) not in table.terms:
            raise InputError("targets", f"term (l={l}, m={m}) is not in the fit up to order {table.order}", source)
        if l == 0:
            raise InputError("targets", "a constant potential (l = 0) exerts no force; expected l >= 1", source)
        v = float(val)
        if not math.isfinite(v):
            raise InputError("targets", f"expected a finite value for (l={l}, m={m})", source)
        out[(l, m)] = v
    return out


@dataclass(frozen=True)
class StaticSolution:
    """Static voltage set for target multipoles.

    Attributes
    ----------
    channels : tuple of str
        All channels of the layout.
    voltages_v : (n_channels,) array
        Solved voltages (0 on rf channels and unused channels), V.
    limits_v : (n_channels,) array
    targets : dict (l, m) -> value
        Requested coefficients, V/m^l.
    achieved : dict (l, m) -> value
        Coefficients the voltages produce (from the fit table), V/m^l.
    coeffs : (n_terms,) array
        All coefficients C_lm produced, V/m^l (includes the unwanted ones).
    reached : bool
        Every target met to ``tolerance_v`` (rms potential at the crystal radius).
    shortfall : dict (l, m) -> value
        target - achieved, V/m^l.
    error_v : float
        Largest target miss as rms potential at the crystal radius, V.
    tolerance_v : float
    peak_ratio_unbounded : float
        max |V_e| / L_e of the same problem solved without limits (> 1: the
        targets need that factor more voltage than the limits allow).
    crystal_radius_m : float
    fit_residual_v : float
        Bound on the fit residual of the combined potential (sum |V_e| times
        each channel's residual), V.
    table : MultipoleTable
    caution : str
    """

    channels: tuple
    voltages_v: np.ndarray
    limits_v: np.ndarray
    targets: dict
    achieved: dict
    coeffs: np.ndarray
    reached: bool
    shortfall: dict
    error_v: float
    tolerance_v: float
    peak_ratio_unbounded: float
    crystal_radius_m: float
    fit_residual_v: float
    table: MultipoleTable = field(repr=False)
    caution: str = CAUTION

    def to_dict(self) -> dict:
        return {
            "channels": {c: float(v) for c, v in zip(self.channels, self.voltages_v)},
            "targets": [{"l": l, "m": m, "target": t, "achieved": self.achieved[(l, m)],
                         "shortfall": self.shortfall[(l, m)]} for (l, m), t in self.targets.items()],
            "reached": self.reached,
            "error_v": self.error_v,
            "peak_ratio_unbounded": self.peak_ratio_unbounded,
            "caution": self.caution,
        }


def solve_static(layout, targets: dict, *, table: MultipoleTable | None = None, channels=None,
                 crystal_radius_m: float | None = None, limits_v=None, suppress_order: int | None = None,
                 free=(), rtol: float = 1e-3, tolerance_v: float | None = None,
                 target_weight: float = TARGET_WEIGHT, regularization: float = REGULARIZATION) -> StaticSolution:
    """Static voltages that make target multipole coefficients.

    Parameters
    ----------
    layout : Layout
    targets : dict (l, m) -> float
        Target coefficients in V/m^l (see :func:`~mdrotor.electrodes.harmonic_fit.field_terms`
        for a compensation field, :func:`~mdrotor.electrodes.harmonic_fit.hessian_terms`
        for a static curvature, :func:`~mdrotor.electrodes.harmonic_fit.inplane_terms`
        for an in-plane multipole).
    table : MultipoleTable, optional
        Per-channel fit (default: :func:`fit_multipoles` about the trap point).
    channels : sequence of str, optional
        dc channels to use (default: all dc channels).
    crystal_radius_m : float, optional
        Radius on which targets and unwanted terms are weighed (default: the
        fit radius).
    limits_v : array-like, optional
        Per-channel limits overriding the layout's (e.g. to keep headroom).
    suppress_order : int, optional
        Highest order of unwanted terms pushed to zero (default: table order).
    free : sequence of (l, m)
        Terms left free (neither target nor pushed to zero).
    rtol : float
        Relative tolerance for ``reached`` (of the largest target potential).
    tolerance_v : float, optional
        Absolute tolerance in V of rms potential at the crystal radius
        (default: rtol times the largest target's, or 1 nV if all are zero).

    Returns
    -------
    StaticSolution
    """
    table, use, rho, w = _prepare(layout, table, channels, crystal_radius_m)
    tg = _check_targets(targets, table, layout.source)
    limits = layout.channel_limits_v.copy() if limits_v is None else np.asarray(limits_v, dtype=float)
    if limits.shape != (layout.n_channels,) or np.any(limits[use] <= 0):
        raise InputError("limits_v", f"expected {layout.n_channels} positive channel limits", layout.source)
    order = table.order if suppress_order is None else int(suppress_order)
    free = {tuple(f) for f in free}
    tpot = max([abs(v) * w[table.index(*k)] for k, v in tg.items()] + [0.0])
    scale = tpot if tpot > 0 else 1e-9
    tol = (rtol * tpot if tpot > 0 else 1e-9) if tolerance_v is None else float(tolerance_v)
    L = limits[use]
    A, b = _rows(table, use, L, w, tg, scale, order, free, target_weight, regularization)
    x = _lsq(A, b, np.ones(len(use)))
    x_free, *_ = np.linalg.lstsq(A, b, rcond=None)
    V = np.zeros(layout.n_channels)
    V[use] = x * L
    C = table.combine(V)
    achieved = {k: float(C[table.index(*k)]) for k in tg}
    short = {k: tg[k] - achieved[k] for k in tg}
    err = max([abs(short[k]) * w[table.index(*k)] for k in tg] + [0.0])
    return StaticSolution(
        channels=tuple(layout.channels), voltages_v=V, limits_v=limits, targets=tg, achieved=achieved, coeffs=C,
        reached=bool(err <= tol), shortfall=short, error_v=float(err), tolerance_v=float(tol),
        peak_ratio_unbounded=float(np.max(np.abs(x_free))), crystal_radius_m=rho,
        fit_residual_v=float(np.abs(V) @ table.residual_rms), table=table)


@dataclass(frozen=True)
class RotatingPlan:
    """Voltages that make an order-n multipole rotate with the pinning angle.

    V_e(theta) = static_v[e] + amplitudes_v[e] cos(n theta - phases_rad[e]),
    theta the pinning angle (2 pi times the integral of f_rot); the intended
    potential is Re[c (x + i y)^n e^{-i n theta}] about the trap point.

    Attributes
    ----------
    order : int
    strength_si : float
        Requested c in V/m^n.
    channels : tuple of str
    static_v, amplitudes_v, phases_rad, limits_v : (n_channels,) arrays
    coeff_static, coeff_cos, coeff_sin : (n_terms,) arrays
        C_lm(theta) = coeff_static + coeff_cos cos(n theta) + coeff_sin sin(n theta), V/m^l.
    k_corot, k_counter : complex
        Achieved k_n(theta) = k_corot e^{-i n theta} + k_counter e^{+i n theta}
        from the rotating voltages (target: strength, 0), V/m^n.
    reached : bool
        |k_corot - c| and |k_counter| both within rtol * c.
    shortfall_si : float
        c - |k_corot| (> 0 when the limits cap the strength), V/m^n.
    shortfall_rel : float
        |k_corot - c| / c.
    peak_ratio_unbounded : float
        max_e A_e / (L_e - |s_e|) of the same problem without limits; > 1 is
        the factor by which the limits would have to grow. Meaningful only
        when ``producible``.
    producible : bool
        The same problem without limits reaches the target: only the limits
        stand in the way (True when reached).
    lacking : str
        When not ``producible``: what the layout lacks, in words (see
        :func:`lacking_terms`); else "".
    crystal_radius_m : float
    fit_residual_v : float
        Bound on the fit residual of the combined potential at the largest
        voltages, V.
    table : MultipoleTable
    caution : str
    """

    order: int
    strength_si: float
    channels: tuple
    static_v: np.ndarray
    amplitudes_v: np.ndarray
    phases_rad: np.ndarray
    limits_v: np.ndarray
    coeff_static: np.ndarray
    coeff_cos: np.ndarray
    coeff_sin: np.ndarray
    k_corot: complex
    k_counter: complex
    reached: bool
    shortfall_si: float
    shortfall_rel: float
    peak_ratio_unbounded: float
    crystal_radius_m: float
    fit_residual_v: float
    table: MultipoleTable = field(repr=False)
    caution: str = CAUTION
    producible: bool = True
    lacking: str = ""

    def shortfall_text(self) -> str:
        """Why the target is not reached, in one sentence ("" when it is):
        the layout cannot make this multipole at any voltage (and what it
        lacks), or its limits cap the strength (and by how much they would
        have to grow)."""
        n, c = self.order, self.strength_si
        if self.reached:
            return ""
        if not self.producible:
            return f"the layout cannot produce a rotating order-{n} multipole at any voltage: {self.lacking}"
        return (f"the target c_{n} = {c:.4g} V/m^{n} is not reached within the voltage limits (achieved {abs(self.k_corot):.4g}, "
                f"{self.shortfall_rel * 100:.3g} % short; the limits would have to grow {self.peak_ratio_unbounded:.3g}x)")

    def voltages_at(self, theta_rad) -> np.ndarray:
        """Channel voltages (V) at pinning angle(s) theta, shape (..., n_channels)."""
        th = np.asarray(theta_rad, dtype=float)[..., None]
        return self.static_v + self.amplitudes_v * np.cos(self.order * th - self.phases_rad)

    def coefficients_at(self, theta_rad) -> np.ndarray:
        """All coefficients C_lm (V/m^l) at pinning angle(s) theta, shape (..., n_terms)."""
        th = np.asarray(theta_rad, dtype=float)[..., None]
        return self.coeff_static + self.coeff_cos * np.cos(self.order * th) + self.coeff_sin * np.sin(self.order * th)

    def k_inplane_at(self, theta_rad) -> np.ndarray:
        """In-plane k_n (V/m^n), n = 1..table.order, at angle(s) theta, shape (..., order)."""
        C = self.coefficients_at(theta_rad)
        t = self.table
        return np.stack([C[..., t.index(n, n)] - 1j * C[..., t.index(n, -n)] for n in range(1, t.order + 1)], axis=-1)

    def unwanted(self) -> list[dict]:
        """Every term other than the target and the constant, strongest first.

        Each entry: l, m, static (V/m^l), amplitude (V/m^l; the rotating part's
        peak), and rel: its largest rms potential on the crystal sphere
        relative to the target's.
        """
        t = self.table
        j0, j1 = t.index(self.order, self.order), t.index(self.order, -self.order)
        wt = t.term_rms[j0] * self.crystal_radius_m ** self.order * self.strength_si
        out = []
        for j, (l, m) in enumerate(t.terms):
            if l == 0 or j in (j0, j1):
                continue
            amp = float(np.hypot(self.coeff_cos[j], self.coeff_sin[j]))
            size = (abs(self.coeff_static[j]) + amp) * t.term_rms[j] * self.crystal_radius_m ** l
            out.append({"l": l, "m": m, "static": float(self.coeff_static[j]), "amplitude": amp,
                        "rel": float(size / wt) if wt > 0 else float("inf")})
        return sorted(out, key=lambda d: -d["rel"])

    def to_dict(self) -> dict:
        return {
            "order": self.order,
            "strength_si": self.strength_si,
            "channels": [{"name": c, "static_v": float(s), "amplitude_v": float(a), "phase_rad": float(p),
                          "limit_v": float(l)}
                         for c, s, a, p, l in zip(self.channels, self.static_v, self.amplitudes_v, self.phases_rad,
                                                  self.limits_v)],
            "k_corot": {"re": self.k_corot.real, "im": self.k_corot.imag},
            "k_counter": {"re": self.k_counter.real, "im": self.k_counter.imag},
            "reached": self.reached,
            "shortfall_si": self.shortfall_si,
            "shortfall_rel": self.shortfall_rel,
            "peak_ratio_unbounded": self.peak_ratio_unbounded,
            "producible": self.producible,
            "lacking": self.lacking,
            "shortfall_text": self.shortfall_text(),
            "unwanted": self.unwanted()[:12],
            "caution": self.caution,
        }


def solve_rotating(layout, order: int, strength_si: float, *, static_v=None, table: MultipoleTable | None = None,
                   channels=None, crystal_radius_m: float | None = None, suppress_order: int | None = None,
                   free=(), rtol: float = 1e-3, rounds: int = 8, target_weight: float = TARGET_WEIGHT,
                   regularization: float = REGULARIZATION) -> RotatingPlan:
    """Sinusoidal voltages that rotate an order-n in-plane multipole.

    Parameters
    ----------
    layout : Layout
    order : int
        In-plane order n (1..table.order).
    strength_si : float
        c_n in V/m^n (> 0).
    static_v : array-like, mapping or StaticSolution, optional
        Static voltages added to the rotating ones (they use up part of each
        limit), default 0.
    table, channels, crystal_radius_m, suppress_order, free, rtol
        As in :func:`solve_static`.
    rounds : int
        Rounds of the inscribed-box refinement when the relaxed solution
        exceeds a limit.

    Returns
    -------
    RotatingPlan
    """
    table, use, rho, w = _prepare(layout, table, channels, crystal_radius_m)
    src = layout.source
    if not (isinstance(order, int) and 1 <= order <= table.order):
        raise InputError("pinning.order", f"expected a whole number 1..{table.order}, got {order!r}", src)
    if not (math.isfinite(strength_si) and strength_si > 0):
        raise InputError("pinning.strength", f"expected a positive strength in V/m^{order}, got {strength_si!r}", src)
    if isinstance(static_v, StaticSolution):
        static = static_v.voltages_v.copy()
    elif static_v is None:
        static = np.zeros(layout.n_channels)
    else:
        static = layout.voltage_vector(static_v)
    limits = layout.channel_limits_v.copy()
    head = limits - np.abs(static)
    if np.any(head[use] < 0):
        bad = layout.channels[use[int(np.argmin(head[use]))]]
        raise InputError("static_v", f"static voltage on '{bad}' exceeds its limit", src)
    sup = table.order if suppress_order is None else int(suppress_order)
    free = {tuple(f) for f in free}
    c = float(strength_si)
    jc, js = table.index(order, order), table.index(order, -order)
    scale = c * w[jc]
    H = head[use]
    Hs = np.where(H > 0, H, 1.0)
    tg_p = {(order, order): c, (order, -order): 0.0}
    tg_q = {(order, order): 0.0, (order, -order): c}
    Ap, bp = _rows(table, use, Hs, w, tg_p, scale, sup, free, target_weight, regularization)
    Aq, bq = _rows(table, use, Hs, w, tg_q, scale, sup, free, target_weight, regularization)

    def cost(xp, xq):
        return float(np.sum((Ap @ xp - bp) ** 2) + np.sum((Aq @ xq - bq) ** 2))

    live = H > 0
    n_use = len(use)
    # unbounded optimum: its phases seed the bounded search
    fp, *_ = np.linalg.lstsq(Ap, bp, rcond=None)
    fq, *_ = np.linalg.lstsq(Aq, bq, rcond=None)
    # relaxation: independent boxes |p|, |q| <= headroom (optimal if inside the discs)
    xp = _lsq(Ap, bp, live.astype(float))
    xq = _lsq(Aq, bq, live.astype(float))
    if np.all(np.hypot(xp, xq) <= 1.0 + 1e-9):
        best = (xp, xq)
    else:
        # always feasible fallback: boxes inscribed in the discs at 45 degrees
        s2 = live / math.sqrt(2.0)
        best = (_lsq(Ap, bp, s2), _lsq(Aq, bq, s2))
        best_cost = cost(*best)
        # boxes rotated to each channel's phase phi: (p, q) = a (cos, sin) + b (-sin, cos),
        # |a| <= cos(delta), |b| <= sin(delta) (inside the unit disc); the phases
        # follow the solution from round to round while delta shrinks
        phi = np.arctan2(fq, fp)
        for delta in np.geomspace(0.5, 0.01, max(2, rounds)):
            c_, s_ = np.cos(phi), np.sin(phi)
            A = np.block([[Ap * c_, -Ap * s_], [Aq * s_, Aq * c_]])
            b = np.concatenate([bp, bq])
            ab = _lsq(A, b, np.concatenate([live * math.cos(delta), live * math.sin(delta)]))
            a_, b_ = ab[:n_use], ab[n_use:]
            cand = (a_ * c_ - b_ * s_, a_ * s_ + b_ * c_)
            cst = cost(*cand)
            if cst < best_cost:
                best, best_cost = cand, cst
            amp = np.hypot(*cand)
            phi = np.where(amp > 1e-9, np.arctan2(cand[1], cand[0]), phi)
    xp, xq = best
    peak_free = float(np.max(np.hypot(fp, fq) * Hs / np.where(H > 0, H, np.inf)))

    def miss_of(gp, gq):  # relative miss of the rotating target by cosine / sine voltages (scaled units)
        vp, vq = np.zeros(layout.n_channels), np.zeros(layout.n_channels)
        vp[use], vq[use] = gp * Hs, gq * Hs
        cc, cs = table.combine(vp), table.combine(vq)
        al, be = cc[jc] - 1j * cc[js], cs[jc] - 1j * cs[js]
        return max(abs(0.5 * (al + 1j * be) - c), abs(0.5 * (al - 1j * be))) / c

    clean = resolved_table(table)

    def reaches(extra_free=()):  # the problem without limits on the resolved table, more terms left free
        fr = free | set(extra_free)
        A1, b1 = _rows(clean, use, Hs, w, tg_p, scale, sup, fr, target_weight, regularization)
        A2, b2 = _rows(clean, use, Hs, w, tg_q, scale, sup, fr, target_weight, regularization)
        return miss_of(np.linalg.lstsq(A1, b1, rcond=None)[0], np.linalg.lstsq(A2, b2, rcond=None)[0]) <= rtol

    producible = reaches()
    lacking = "" if producible else lacking_terms(clean, use, order, sup, free, reaches)
    p = np.zeros(layout.n_channels)
    q = np.zeros(layout.n_channels)
    p[use] = np.where(live, xp * Hs, 0.0)
    q[use] = np.where(live, xq * Hs, 0.0)
    idle = np.hypot(p, q) <= 1e-12 * limits  # left idle by the solve (~1e-14 V): exactly 0
    p[idle] = q[idle] = 0.0
    Ccos, Csin, Cst = table.combine(p), table.combine(q), table.combine(static)
    alpha = Ccos[jc] - 1j * Ccos[js]
    beta_ = Csin[jc] - 1j * Csin[js]
    k_co = 0.5 * (alpha + 1j * beta_)
    k_ct = 0.5 * (alpha - 1j * beta_)
    miss = max(abs(k_co - c), abs(k_ct)) / c
    amps = np.hypot(p, q)
    peak = np.abs(static) + amps
    return RotatingPlan(
        order=order, strength_si=c, channels=tuple(layout.channels), static_v=static, amplitudes_v=amps,
        phases_rad=np.arctan2(q, p), limits_v=limits, coeff_static=Cst, coeff_cos=Ccos, coeff_sin=Csin,
        k_corot=complex(k_co), k_counter=complex(k_ct), reached=bool(miss <= rtol), shortfall_si=float(c - abs(k_co)),
        shortfall_rel=float(abs(k_co - c) / c), peak_ratio_unbounded=peak_free, crystal_radius_m=rho,
        fit_residual_v=float(peak @ table.residual_rms), table=table, producible=bool(producible or miss <= rtol),
        lacking=lacking if miss > rtol else "")


def resolved_table(table: MultipoleTable) -> MultipoleTable:
    """The table with every coefficient the fit does not resolve set to 0.

    A coefficient counts as resolved when its term's rms potential on the fit
    sphere, |C_lm| rho_fit^l s_lm per volt, exceeds 10 times the channel's fit
    residual (the rule of :meth:`MultipoleTable.significant_orders`); below
    that it is the fit's rounding noise (a centred disc's 1e-18 order-4
    coefficient, say), which a solve without limits would otherwise exploit
    with absurd voltages.
    """
    size = np.abs(table.coeffs) * np.array([table.term_rms[j] * table.radius_m ** l for j, (l, m) in enumerate(table.terms)])
    floor = 10.0 * np.maximum(table.residual_rms, 1e-15 * table.potential_rms)
    return replace(table, coeffs=np.where(size > floor[:, None], table.coeffs, 0.0))


def lacking_terms(table: MultipoleTable, use, order: int, suppress_order: int, free, reaches) -> str:
    """What a layout lacks to make a rotating order-n multipole, in words.

    A rotating pattern Re[c (x + i y)^n e^{-i n theta}] needs both sectoral
    components of order n, C_nn (cos n phi) and C_n,-n (sin n phi), made
    independently of every term that must stay zero. In order:

    * no dc channel makes an order-n term: the layout lacks order n;
    * the channels make only one orientation (the 2 x channels matrix of
      per-volt C_nn, C_n,-n has rank 1): it lacks the other;
    * they make both, but only together with terms of another azimuthal
      order |m| (every l), or of another order l, that must stay zero
      (leaving those free lets the solve reach the target): it lacks an
      order-n pattern independent of them (a ring of k equal segments, for
      example, makes azimuthal order n only together with its alias |k - n|).

    A component counts as made when the fit resolves it
    (:func:`resolved_table`).

    Parameters
    ----------
    table : MultipoleTable
        Resolved coefficients (:func:`resolved_table`).
    use : sequence of int
        The dc channels of the solve.
    order, suppress_order : int
    free : set of (l, m)
        Terms already left free.
    reaches : callable
        ``reaches(extra_free) -> bool``: whether the solve without limits
        reaches the target with the terms ``extra_free`` also left free.
    """
    jc, js = table.index(order, order), table.index(order, -order)
    T = table.coeffs[use][:, [jc, js]].T
    sv = np.linalg.svd(T, compute_uv=False)
    rank = int(np.sum(sv > 1e-9 * max(float(sv[0]), 1e-300))) if np.any(T) else 0
    if rank == 0:
        return (f"no dc channel makes an in-plane order-{order} term (l = {order}, m = +-{order}); "
                f"the layout lacks order {order}")
    if rank == 1:
        return (f"its dc channels make only one orientation of the order-{order} term, and a rotating pattern needs "
                f"two (cos and sin {order} phi); the layout lacks the other orientation of order {order}")
    target = ((order, order), (order, -order))
    terms = [(l, m) for (l, m) in table.terms if 1 <= l <= suppress_order and (l, m) not in target]
    # terms of one azimuthal order |m| (the aliases of a segmented ring), then of one order l
    by_m = [mm for mm in range(0, suppress_order + 1) if reaches([(l, m) for l, m in terms if abs(m) == mm])]
    if by_m:
        alias = " or ".join(str(mm) for mm in by_m)
        return (f"its dc channels make order {order} only together with terms of azimuthal order {alias} "
                f"(cos and sin {alias} phi, l = {max(by_m[0], 1)}..{suppress_order}) that must stay zero; the layout lacks "
                f"an order-{order} pattern independent of azimuthal order {alias}")
    by_l = [l for l in range(1, suppress_order + 1) if reaches([(ll, m) for ll, m in terms if ll == l])]
    if by_l:
        alias = " or ".join(str(l) for l in by_l)
        return (f"its dc channels make order {order} only together with an order-{alias} term that must stay zero; "
                f"the layout lacks an order-{order} pattern independent of order {alias}")
    return (f"its dc channels make order {order} only together with terms of several other orders that must stay "
            f"zero; the layout lacks an independent order-{order} pattern")
