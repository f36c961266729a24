"""RF micromotion of a full-RF run: the measured micromotion kinetic energy
at the end, beside the lowest-order Mathieu expectation for each ion."""

from __future__ import annotations

import numpy as np

from mdrotor.results.stats import mean_sem
from mdrotor.results.status import usable

TWO_PI = 2.0 * np.pi


def micromotion_report(plan, raw) -> dict:
    """Intrinsic micromotion of the rotating crystal at the end of the run.

    Each ion at distance r_i from the RF null moves on the RF orbit with
    amplitude (q_i / 2) r_i per in-plane axis (lowest order, Leibfried et al.,
    Rev. Mod. Phys. 75, 281 (2003); for a stray-field displacement the same
    law is the excess micromotion of D.J. Berkeland et al., J. Appl. Phys.
    83, 5025 (1998)), so its time-averaged micromotion kinetic energy is
    m_i (q_i W r_i)^2 / 16 (x and y together). The measured value is the
    RF-period average of the kinetic energy minus that of the secular
    velocity, averaged over trajectories.
    """

    fin = list(raw.stages.values())[-1]
    ok = usable(fin["status"])
    f_end = float(np.mean(fin["f_rot_hz"][ok])) if np.any(ok) else 0.0
    t_end = plan.schedule.duration_s
    cr = plan.crystal_at(t_end, f_end)
    q = plan.cfg.trap.q_per_ion(plan.masses, plan.charges)
    W = TWO_PI * plan.f_drive_hz
    r = cr.positions_m
    radius = np.hypot(r[:, 0], r[:, 1])
    ke = float(np.sum(plan.masses[:, None] * (q * W * r) ** 2 / 16.0))
    meas, err = mean_sem(fin["micromotion_ke_j"][ok])
    return {"amplitude_radial_m": 0.5 * np.abs(q[:, 0]) * radius, "amplitude_axial_m": 0.5 * np.abs(q[:, 2] * r[:, 2]),
            "radius_m": radius, "f_rot_hz": f_end,
            "ke_lowest_order_j": ke, "ke_measured_j": meas, "ke_measured_err_j": err}
