"""Observables (mdrotor.engine.observe) of hand-built states of the pinned two-ion crystal,
against the rigid-rotor angular momentum and the energies of its normal modes."""

import math

import numpy as np
import pytest
from conftest import two_ion_config
from scipy import constants as sc

from mdrotor.config import parse as config
from mdrotor.engine import integrate as engine
from mdrotor.engine.observe import lattice_node, observe
from mdrotor.results.status import Status, usable

W_ROT = 2 * math.pi * 3e3  # a small rigid rotation (rad/s)
DZ = 20e-9                 # a small common axial displacement (m)


@pytest.fixture(scope="module")
def plan():
    return engine.make_plan(config.from_dict(two_ion_config(), "pair.toml"))


@pytest.fixture(scope="module")
def observed(plan):
    r0 = plan.crystal0.positions_m  # (N, 3) equilibrium at t = 0 (lab frame, f_rot = 0)
    T = 5
    pos = np.repeat(r0.T[:, :, None], T, axis=2).copy()
    vel = np.zeros_like(pos)
    pos[2, :, 1] += DZ                        # 1: both ions displaced along z
    vel[0, :, 2] = -W_ROT * r0[:, 1]          # 2: turning rigidly at W_ROT
    vel[1, :, 2] = W_ROT * r0[:, 0]
    pos[0, 0, 3] = 2 * plan.loss_radius_m     # 3: an ion beyond the loss radius
    pos[1, 1, 4] = np.nan                     # 4: a non-finite state
    lag_u = np.full((1, T), plan.lag_u_ref)
    return observe(plan, pos, vel, 0.0, lag_u)


def test_angular_momentum_of_a_rigid_rotation(plan, observed):
    # L_z = I w with I = sum m (x^2 + y^2) (rigid body, H. Goldstein, Classical Mechanics, ch. 5)
    r0 = plan.crystal0.positions_m
    I = float(np.sum(plan.masses * (r0[:, 0] ** 2 + r0[:, 1] ** 2)))
    assert observed["L_hbar"][2] == pytest.approx(I * W_ROT / sc.hbar, rel=1e-12, abs=0)
    assert observed["L_com_hbar"][2] == pytest.approx(I * W_ROT / sc.hbar, rel=1e-9, abs=0)
    assert observed["f_rot_hz"][2] == pytest.approx(W_ROT / (2 * math.pi), rel=1e-9, abs=0)
    assert observed["L_hbar"][0] == 0.0 and observed["L_hbar"][1] == 0.0


def test_phonons_of_the_axial_centre_of_mass_mode(plan, observed):
    # identical ions: the axial COM mode oscillates at the trap's axial frequency
    # (D.F.V. James, Appl. Phys. B 66, 181 (1998)); a common displacement dz holds
    # E = (1/2) (2 m) w_z^2 dz^2, i.e. n = E / (hbar w_z) (classical sampling: no 1/2 subtracted)
    labels = plan.crystal0.modes.labels
    k = labels.index("com-z")
    w_z = 2 * math.pi * 2.9e6
    assert plan.crystal0.modes.freq_hz[k] == pytest.approx(2.9e6, rel=1e-9, abs=0)
    m = plan.masses[0]
    n = 0.5 * 2 * m * w_z**2 * DZ**2 / (sc.hbar * w_z)
    mode_n = observed["mode_n"]
    assert mode_n[1, k] == pytest.approx(n, rel=1e-9, abs=0)
    others = np.delete(mode_n[1], k)
    assert np.all(np.abs(others) < 1e-9 * n)
    assert np.all(np.abs(mode_n[0]) < 1e-9)  # the equilibrium holds no phonon


def test_a_slow_rigid_turn_is_libration(plan, observed):
    # two ions of charge Q under Phi = c Re[(x + i y)^2]: U(phi) = 2 Q c r^2 cos(2 phi), I = 2 m r^2, so the
    # libration is w_lib = sqrt(U'' / I) = 2 sqrt(Q c / m), independent of r (derivation; rigid pair)
    m, c = plan.masses[0], 2e5
    w_lib = 2 * math.sqrt(sc.e * c / m)
    k = plan.crystal0.modes.labels.index("libration")
    assert plan.crystal0.modes.freq_hz[k] == pytest.approx(w_lib / (2 * math.pi), rel=1e-6, abs=0)
    # its kinetic energy I w^2 / 2 in quanta of hbar w_lib
    r0 = plan.crystal0.positions_m
    I = float(np.sum(plan.masses * (r0[:, 0] ** 2 + r0[:, 1] ** 2)))
    assert observed["mode_n"][2, k] == pytest.approx(0.5 * I * W_ROT**2 / (sc.hbar * w_lib), rel=1e-6, abs=0)


def test_lost_and_nonfinite_are_flagged_and_left_out(observed):
    status = observed["status"]
    assert list(status) == [Status.OK, Status.OK, Status.OK, Status.LOST, Status.NONFINITE]
    assert list(usable(status)) == [True, True, True, False, False]
    assert np.all(np.isnan(observed["mode_n"][3:]))
    # a slipped or reordered trajectory still counts; a lost or non-finite one does not
    assert list(usable([Status.SLIPPED | Status.REORDERED, Status.SLIPPED | Status.LOST])) == [True, False]
    # the bits as result files describe them
    assert Status.describe() == "1 slipped, 2 lost ion, 4 reordered, 8 non-finite"
    assert [int(s) for s in (Status.SLIPPED, Status.LOST, Status.REORDERED, Status.NONFINITE)] == [1, 2, 4, 8]


@pytest.mark.parametrize("f_sched_hz", [0.0, 50e3])
def test_mode_columns_in_an_anisotropic_trap_come_from_the_schedule(f_sched_hz):
    # A free crystal in a trap with a static radial anisotropy: at rest it
    # librates about the anisotropy (one mode more in the lab frame), while
    # rotating that libration is the free rotation itself and no mode. The
    # columns of the observation follow the schedule's rate, whatever the mix
    # of trajectories (at rest and rotating) measured together, and each
    # trajectory's modes land in the columns of the same meaning.
    # Mode counting: a free rotation is a zero mode of the rotating frame
    # (H. Goldstein, Classical Mechanics, ch. 6, cyclic coordinates).
    stages = [{"name": "spin-up", "duration": "20 us", "f_rot": {"to": f"{f_sched_hz} Hz", "shape": "linear"}},
              {"name": "release", "duration": "5 us", "pinning": {"to": 0.0, "shape": "linear"}}]
    trap = {"f_radial": "1.2 MHz", "f_axial": "2.9 MHz", "radial_split": "20 kHz"}
    plan = engine.make_plan(config.from_dict(two_ion_config(trap=trap, stage=stages), "split.toml"))
    t_end = 25e-6
    assert not plan.pinned_at(t_end)
    _, r_rest, lab_modes, _ = lattice_node(plan, 0)
    assert "libration" in lab_modes.labels
    r = r_rest
    w = 2 * math.pi * 50e3
    pos = np.repeat(r.T[:, :, None], 2, axis=2).copy()
    vel = np.zeros_like(pos)
    vel[0, :, 0] = -w * r[:, 1]          # 0: turning rigidly at 50 kHz
    vel[1, :, 0] = w * r[:, 0]
    lag_u = np.full((1, 2), plan.lag_u_ref)
    out = observe(plan, pos, vel, t_end, lag_u)
    cols = list(out["_modes"].labels)
    assert out["mode_n"].shape == (2, len(cols))
    assert ("libration" in cols) == (f_sched_hz == 0.0)
    rest, spin = out["mode_n"][1], out["mode_n"][0]
    # at rest, at the equilibrium, T = 0 without Wigner sampling: every mode empty
    assert np.all(np.isfinite(rest)) and np.max(np.abs(rest)) < 1e-6
    for k, lab_k in enumerate(cols):
        assert np.isfinite(spin[k]) == (lab_k != "libration")


def test_a_lag_phase_that_went_non_finite_flags_the_trajectory(plan):
    # the kernel's lag phase is NaN after a trajectory blew up: no slip count
    # can be read from it (no cast of NaN to an integer), the trajectory is
    # flagged non-finite and left out  # common practice, no source
    import warnings

    r0 = plan.crystal0.positions_m
    pos = np.repeat(r0.T[:, :, None], 2, axis=2).copy()
    vel = np.zeros_like(pos)
    lag_u = np.array([[plan.lag_u_ref, np.nan]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = observe(plan, pos, vel, 0.0, lag_u)
    assert list(out["status"] & int(Status.NONFINITE)) == [0, int(Status.NONFINITE)]
    assert out["slips"][1] == 0 and np.isnan(out["lag_rad"][1]) and out["lag_rad"][0] == 0.0
    assert list(usable(out["status"])) == [True, False]
