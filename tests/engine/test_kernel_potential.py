"""The compiled kernel's forces against the statics potential they must derive from.

The dynamics (``kernels._accel``, ``kernels._poly_accel``, ``kernels._noise_accel``)
and the statics (``statics.Potential``: equilibria and modes) write every force
term separately. Here the kernel's acceleration, built from a config by the
engine's own plan (``engine.make_plan``, ``_pin_coefficients``,
``_poly_coefficients``), is compared with -grad(Phi) / m of the statics
potential built from the same config (``statics.model_potential``), at random
positions of a mixed-species crystal, for every kind of term.

Tolerance: both sides evaluate the same closed forms in double precision
(rounding ~1e-16 per operation, at most a few tens of operations per term);
at random positions the terms do not cancel by more than a factor ~1e3, so
the largest difference over the ions is asserted below 1e-10 of the largest
acceleration: for the whole force, and for each term alone (the kernel with
only that term's arrays non-zero, the statics term from a one-ion copy of the
potential), to its own size, so that a weak term is checked as sharply as a
strong one. A wrong sign, factor, convention or charge-to-mass scaling gives
a difference of order one (a 1e-9 relative error in the multipole gradient
already fails).
"""

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from mdrotor.config.parse import from_dict
from mdrotor.engine import kernels
from mdrotor.engine.integrate import _pin_coefficients, _poly_coefficients, make_plan
from mdrotor.physics.statics import Potential

TWO_PI = 2 * np.pi
CONFIGS = Path(__file__).resolve().parents[2] / "configs"
MIXED = ["40Ca+", "9Be+", "40Ca2+", "88Sr+"]
REL = 1e-10
T_EVAL = 7.3e-6  # the pinning has turned by a non-trivial angle by then


def _weak_multipole(n: int, angle: str) -> dict:
    """An order-n pinning term whose force on 40Ca+ at 3 um is ~1e-4 of the
    trap's: the equilibrium search at t = 0 still finds this mixed crystal
    bound (at ~1e-2 it does not for n >= 4). The terms are compared to their
    own size below, so weak terms are checked as sharply as strong ones."""
    return {"order": n, "strength": f"{2e3 * 3.3e5 ** (n - 2) / n:.3g} V/m^{n}", "angle": angle}


def _config(kind: str, model: str = "pseudo"):
    d = {"species": {"ion": "40Ca+"}, "crystal": {"ions": MIXED},
         "trap": {"model": model, "f_radial": "1.0 MHz", "f_axial": "2.6 MHz", "f_drive": "40 MHz"},
         "stage": [{"name": "spin-up", "duration": "20 us", "f_rot": {"to": "90 kHz", "shape": "smoothstep"}}],
         "initial": {"temperature": "0 K", "wigner": False}, "run": {"trajectories": 1, "seed": 1}}
    if kind == "anisotropic":
        d["trap"]["radial_split"] = "60 kHz"
    elif kind.startswith("multipole"):
        d["pinning"] = _weak_multipole(int(kind[-1]), "17 deg")
    elif kind == "all-multipoles":
        d["pinning"] = [_weak_multipole(n, f"{11 * n} deg") for n in range(2, 7)]
    elif kind == "stray":
        d["trap"]["stray_field"] = ["30 V/m", "-12 V/m", "7 V/m"]
    elif kind == "layout":
        d["trap"].update({"f_radial": "2.23 MHz", "f_axial": "4.46 MHz", "f_drive": "150 MHz"})
        d["pinning"] = {"order": 2, "strength": "1e6 V/m^2", "layout": "electrodes/ring6_string2.toml"}
    elif kind == "everything":
        d["trap"]["radial_split"] = "60 kHz"
        d["trap"]["stray_field"] = ["30 V/m", "-12 V/m", "7 V/m"]
        d["pinning"] = [_weak_multipole(2, "0 deg"), _weak_multipole(3, "40 deg")]
    return from_dict(d, str(CONFIGS / "kernel_test.toml"), base_dir=CONFIGS)


def _positions(n_ions: int, n_traj: int, seed: int) -> np.ndarray:
    """Random positions (3, N, B) within +-6 um (distinct ions)."""
    rng = np.random.default_rng(seed)
    return rng.uniform(-6e-6, 6e-6, size=(3, n_ions, n_traj))


TERMS = ("trap", "stray", "pin", "poly", "coulomb")


def _kernel_accel(plan, pos: np.ndarray, t: float, rf_phases=None, terms=TERMS) -> np.ndarray:
    """The compiled acceleration (3, N, B) at time t (RF phase W t + phase_b),
    with only the kernel arrays of ``terms`` non-zero ("trap" includes the RF
    force in the RF model)."""
    n, b = pos.shape[1:]
    px, py, pz = (np.ascontiguousarray(pos[u]) for u in range(3))
    ax, ay, az = (np.empty((n, b)) for _ in range(3))
    scratch = [np.empty(b) for _ in range(5)]
    te = np.array([t])
    c_re, c_im = _pin_coefficients(plan, te)
    poly = _poly_coefficients(plan, te)  # None without layout terms
    w2, rf2, stray, qm, kq_i, kq_j = plan.kernel_model()
    if "trap" not in terms:
        w2, rf2 = np.zeros_like(w2), np.zeros_like(rf2)
    if "stray" not in terms:
        stray = np.zeros_like(stray)
    if "pin" not in terms:
        c_re, c_im = np.zeros_like(c_re), np.zeros_like(c_im)
    if "coulomb" not in terms:
        kq_i, kq_j = np.zeros_like(kq_i), np.zeros_like(kq_j)
    rf = np.zeros(b) if rf_phases is None else np.cos(TWO_PI * plan.f_drive_hz * t + rf_phases)
    kernels._accel(px, py, pz, ax, ay, az, w2, rf2, rf, stray, qm, kq_i, kq_j, plan.pin_orders, c_re[0], c_im[0],
                   *scratch)
    if poly is not None and "poly" in terms:
        exps, coef = poly
        deg = int(exps.max())
        kernels._poly_accel(px, py, pz, ax, ay, az, qm, exps, coef[0], *(np.empty((deg + 1, b)) for _ in range(3)))
    return np.stack([ax, ay, az])


def _statics_accel(pot, masses, pos: np.ndarray) -> np.ndarray:
    """-grad(U) / m of the statics potential at every trajectory's positions, (3, N, B)."""
    return np.stack([-pot.gradient(pos[:, :, k].T) / masses[:, None] for k in range(pos.shape[2])], axis=-1).transpose(1, 0, 2)


def _statics_term(pot, term: str, pos: np.ndarray) -> np.ndarray:
    """One term of -grad(U) / m alone, (3, N, B): the single-ion terms from a
    one-ion copy of the potential (no Coulomb, nothing else), Coulomb from
    the crystal with every other term removed. No other term's rounding
    enters, so each term is compared to its own size."""
    m, q = pot.masses_kg, pot.charges_c
    zero = np.zeros((1, 3))
    if term == "coulomb":
        return _statics_accel(Potential(m, q, np.zeros_like(pot.spring_n_per_m)), m, pos)
    out = np.empty_like(pos)
    for i in range(len(m)):
        kw = {"trap": dict(spring_n_per_m=pot.spring_n_per_m[i:i + 1]),
              "stray": dict(spring_n_per_m=zero, stray_field_v_per_m=pot.stray_field_v_per_m),
              "pin": dict(spring_n_per_m=zero, multipoles=pot.multipoles),
              "poly": dict(spring_n_per_m=zero, external=pot.external)}[term]
        one = Potential(m[i:i + 1], q[i:i + 1], **kw)
        out[:, i:i + 1, :] = _statics_accel(one, m[i:i + 1], pos[:, i:i + 1, :])
    return out


def _lab_potential(plan, t: float):
    """The statics potential in the lab frame with the pinning as scheduled at t."""
    return plan.potential(0.0, float(plan.schedule.theta_rad(t)), plan.pin_scales(t))


def _assert_close(a, b):
    scale = np.max(np.abs(b), axis=(0, 1))  # per trajectory
    assert np.all(scale > 0)
    assert np.all(np.max(np.abs(a - b), axis=(0, 1)) < REL * scale)


@pytest.mark.parametrize("kind", ["coulomb", "anisotropic", "multipole2", "multipole3", "multipole4", "multipole5",
                                  "multipole6", "all-multipoles", "stray", "layout", "everything"])
def test_kernel_acceleration_is_minus_gradient_of_statics_potential(kind):
    """Pseudopotential trap (with in-plane anisotropy), multipoles of order 2
    to 6 (each alone and all together, at the pinning angle turned by the
    schedule), stray field and an electrode layout's polynomial, on a crystal
    of 40Ca+, 9Be+, 40Ca2+ and 88Sr+ (the species scaling of the trap,
    :mod:`mdrotor.physics.trap`): the kernel's acceleration is -grad(U)/m of the
    statics potential to 1e-10 (module docstring). The statics gradient is
    itself the derivative of its energy (central differences, below)."""
    cfg = _config(kind)
    plan = make_plan(cfg)
    pos = _positions(len(MIXED), 8, seed=sum(map(ord, kind)))
    pot = _lab_potential(plan, T_EVAL)
    present = {"trap", "coulomb"}
    present |= {"stray"} if np.any(pot.stray_field_v_per_m) else set()
    present |= {"pin"} if pot.multipoles else set()
    present |= {"poly"} if pot.external else set()
    expect = {"coulomb": set(), "anisotropic": set(), "stray": {"stray"}, "layout": {"poly"},
              "everything": {"stray", "pin"}}.get(kind, {"pin"})
    assert present == {"trap", "coulomb"} | expect
    if kind in ("anisotropic", "everything"):
        assert not np.array_equal(pot.spring_n_per_m[:, 0], pot.spring_n_per_m[:, 1])
    # the whole force, and each term alone to its own size
    _assert_close(_kernel_accel(plan, pos, T_EVAL), _statics_accel(pot, plan.masses, pos))
    for term in present:
        _assert_close(_kernel_accel(plan, pos, T_EVAL, terms=(term,)), _statics_term(pot, term, pos))


def test_statics_gradient_is_derivative_of_energy():
    """The statics gradient used above is the derivative of the statics
    energy: central differences with step h = 1e-4 of the 6 um scale
    (truncation h^2 ~ 1e-8 relative, rounding ~1e-16 U / h), to 1e-6."""
    cfg = _config("everything")
    plan = make_plan(cfg)
    pot = _lab_potential(plan, T_EVAL)
    r = _positions(len(MIXED), 1, seed=5)[:, :, 0].T
    h = 6e-10
    g = pot.gradient(r)
    fd = np.zeros_like(r)
    for i in range(r.shape[0]):
        for u in range(3):
            e = np.zeros_like(r)
            e[i, u] = h
            fd[i, u] = (pot.energy(r + e) - pot.energy(r - e)) / (2 * h)
    assert np.max(np.abs(fd - g)) < 1e-6 * np.max(np.abs(g))


@pytest.mark.parametrize("kind", ["coulomb", "everything"])
def test_kernel_rf_force_is_mathieu_force(kind):
    """The full RF model: the kernel's trap force is the Mathieu force
    u'' = -(W^2/4)(a_u - 2 q_u cos(W t + phase)) u (Leibfried et al., Rev.
    Mod. Phys. 75, 281 (2003)) with trap.py's a and q scaled by each ion's
    charge-to-mass ratio relative to the first species (a and q are
    proportional to Q/m; March, J. Mass Spectrom. 32, 351 (1997)), at
    several RF phases; every other term is the statics potential's (its
    harmonic springs, the pseudopotential, left out), to 1e-10."""
    cfg = _config(kind, model="rf")
    plan = make_plan(cfg)
    n = len(MIXED)
    phases = np.linspace(0.0, TWO_PI, 9)[:-1]
    pos = _positions(n, len(phases), seed=11)
    pot = _lab_potential(plan, T_EVAL)
    pot = replace(pot, spring_n_per_m=np.zeros_like(pot.spring_n_per_m))
    ref = _statics_accel(pot, plan.masses, pos)
    W = TWO_PI * cfg.trap.f_drive_hz
    s = (plan.charges / plan.masses) / (plan.charges[0] / plan.masses[0])
    a, q = np.asarray(cfg.trap.a), np.asarray(cfg.trap.q)
    psi = W * T_EVAL + phases
    mathieu = -(W**2 / 4) * (s[None, :, None] * a[:, None, None]
                             - 2 * s[None, :, None] * q[:, None, None] * np.cos(psi)[None, None, :]) * pos
    assert abs(a.sum()) < 1e-12 and abs(q.sum()) < 1e-12  # Laplace
    _assert_close(_kernel_accel(plan, pos, T_EVAL, rf_phases=phases), ref + mathieu)
    _assert_close(_kernel_accel(plan, pos, T_EVAL, rf_phases=phases, terms=("trap",)), mathieu)


@pytest.mark.parametrize("order", [2, 3, 4, 5, 6])
def test_kernel_multipole_noise_force_is_minus_gradient(order):
    """Multipole noise Phi = Re[g_n (x + i y)^n] (the pinning's convention,
    :mod:`mdrotor.physics.noise`): the kernel's noise acceleration is -grad(Q Phi)/m
    of the statics multipole term, per trajectory's own g_n, to 1e-10."""
    cfg = _config("coulomb")
    plan = make_plan(cfg)
    n, b = len(MIXED), 6
    pos = _positions(n, b, seed=order)
    rng = np.random.default_rng(order)
    g = rng.normal(size=(1, 2, b)) * 1e6 * 3.3e5 ** (order - 2)
    out = [np.zeros((n, b)) for _ in range(3)]
    nv = np.zeros((5, b))  # the kernel's noise values: field x, y, z, then g_re, g_im of the one order
    nv[3:] = g[0]
    kernels._noise_accel(np.ascontiguousarray(pos[0]), np.ascontiguousarray(pos[1]), plan.qm, np.array([order]), nv,
                         False, *out, np.empty(b), np.empty(b))   # False: no uniform field part
    got = np.stack(out)
    ref = np.empty_like(got)
    for k in range(b):
        pot = Potential(plan.masses, plan.charges, np.zeros((n, 3)), multipoles=((order, complex(g[0, 0, k], g[0, 1, k])),))
        ref[:, :, k:k + 1] = _statics_term(pot, "pin", pos[:, :, k:k + 1])
    _assert_close(got, ref)
