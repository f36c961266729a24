"""Ground states and stability over a range of cluster sizes (too long for the suite).

    python scripts/statics_scan.py planar --n 9-30 --aspect 30
    python scripts/statics_scan.py sphere --n 2-30
    python scripts/statics_scan.py chain --n 3-10

For each N: the energy found by ``find_equilibrium`` (default starts), the
energy from a second search with another seed and three times the random
starts (a ground state missed by the first shows as a lower second energy),
the shell occupation, the symmetry zero modes set aside and the lowest mode.
Planar clusters are compared with the shell structures of V.M. Bedanov and
F.M. Peeters, Phys. Rev. B 49, 2667 (1994), table I (from memory); chains
on both sides of the zigzag threshold of D.F.V. James, Appl. Phys. B 66,
181 (1998) (threshold from his axial Hessian, computed here).
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
from scipy import constants as sc

from mdrotor.physics import stability
from mdrotor.physics.statics import Potential, compute_crystal, find_equilibrium

M = 40 * sc.atomic_mass
Q = sc.e
TWO_PI = 2 * np.pi
# Bedanov and Peeters (1994), table I (from memory)
BP_SHELLS = {9: (2, 7), 10: (2, 8), 11: (3, 8), 12: (3, 9), 13: (4, 9), 14: (4, 10), 15: (5, 10), 16: (1, 5, 10),
             17: (1, 6, 10), 18: (1, 6, 11), 19: (1, 6, 12), 20: (1, 7, 12), 21: (1, 7, 13), 22: (2, 8, 12),
             23: (2, 8, 13), 24: (3, 8, 13), 25: (3, 9, 13), 26: (3, 9, 14), 27: (4, 9, 14), 28: (4, 10, 14),
             29: (4, 10, 15), 30: (5, 10, 15)}


def _pot(n, f_xy, f_z):
    m = np.full(n, M)
    return Potential(m, np.full(n, Q), m[:, None] * (TWO_PI * np.array([f_xy, f_xy, f_z])) ** 2, np.zeros(3))


def _shells(r, planar):
    rho = np.sort(np.hypot(r[:, 0], r[:, 1]) if planar else np.linalg.norm(r, axis=1))
    cut = 0.2 * rho[-1]
    return tuple(len(s) for s in np.split(rho, np.where(np.diff(rho) > cut)[0] + 1))


def _range(text):
    a, _, b = text.partition("-")
    return range(int(a), int(b or a) + 1)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("kind", choices=("planar", "sphere", "chain"))
    ap.add_argument("--n", default="3-10")
    ap.add_argument("--aspect", type=float, default=30.0, help="f_axial / f_radial of planar clusters")
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    for n in _range(args.n):
        cases = []
        if args.kind == "planar":
            cases.append(("planar", _pot(n, 1e6, args.aspect * 1e6)))
        elif args.kind == "sphere":
            cases.append(("sphere", _pot(n, 1e6, 1e6)))
        else:
            from numpy.linalg import eigvalsh
            from scipy.optimize import minimize

            def f(u):
                d = np.abs(u[:, None] - u[None]) + np.eye(n)
                return 0.5 * np.sum(u * u) + np.sum(np.triu(1 / d, 1))

            u = np.sort(minimize(f, np.linspace(-1, 1, n) * n / 2, method="BFGS", options={"gtol": 1e-12}).x)
            d = np.abs(u[:, None] - u[None]) + np.eye(n)
            a = -2 / d**3
            np.fill_diagonal(a, 0)
            np.fill_diagonal(a, 1 - a.sum(axis=1))
            ratio_c = np.sqrt(np.max(eigvalsh(a)) / 2 - 0.5)
            for fac in (1.02, 0.98):
                cases.append((f"chain x{fac}", _pot(n, fac * ratio_c * 1e6, 1e6)))
        for name, pot in cases:
            t = time.perf_counter()
            try:
                cr = compute_crystal(pot)
            except Exception as e:  # report and go on: this is a scan
                print(f"N={n:3d} {name:12s} FAILED: {e}")
                continue
            e1 = cr.energy_j
            e2 = find_equilibrium(pot, seed=17, n_random=3 * (6 + n)).energy_j
            red = stability.reduce(pot, cr.positions_m)
            sh = _shells(cr.positions_m, name == "planar")
            ref = BP_SHELLS.get(n) if name == "planar" else None
            print(f"N={n:3d} {name:12s} E={e1:.12e} J  second search {(e2 - e1) / abs(e1):+.1e}  shells {sh}"
                  + (f" (Bedanov-Peeters {ref}{'' if ref == sh else ' DIFFERENT'})" if ref else "")
                  + f"  zero modes {red.n_symmetries} {''.join(red.axes)}  neutral {red.n_neutral}"
                  f"  lowest mode {cr.modes.freq_hz[0]:.4g} Hz  ({time.perf_counter() - t:.1f} s)", flush=True)


if __name__ == "__main__":
    main()
