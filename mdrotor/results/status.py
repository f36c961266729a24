"""The status flags of each trajectory and which trajectories enter statistics.

:class:`Status` is the one owner of the bits (lost, non-finite, slipped,
reordered, ...); :func:`usable` is the one rule for what a statistic may use.
"""

from __future__ import annotations

import enum

import numpy as np


class Status(enum.IntFlag):
    """Per-trajectory status flags, stored as the integer ``status`` arrays."""

    OK = 0
    SLIPPED = 1
    LOST = 2
    REORDERED = 4
    NONFINITE = 8

    @classmethod
    def describe(cls) -> str:
        """The bits in words, as stored in result files."""
        return "1 slipped, 2 lost ion, 4 reordered, 8 non-finite"


# trajectories with these flags are left out of the statistics of L, the rate, the lag and the phonons
EXCLUDED = Status.LOST | Status.NONFINITE


def usable(status) -> np.ndarray:
    """Mask of the trajectories that enter the statistics: finite and bound
    (no ion lost). ``status``: the integer status array."""
    return (np.asarray(status) & int(EXCLUDED)) == 0
