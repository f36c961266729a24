"""Errors raised for bad user input.

The CLI turns every :class:`InputError` into one line on stderr and exit
status 2; library code never uses ``assert`` for user input.
"""

from __future__ import annotations


class InputError(ValueError):
    """Bad user input: names the file, the key path and what was expected.

    Parameters
    ----------
    key : str
        Dotted key path in the config (``"trap.f_radial"``), or ``""``.
    expected : str
        What was expected, in words ("a frequency such as '1.1 MHz'").
    source : str, optional
        File the key came from (or ``"<dict>"``, ``"--set"``).
    """

    def __init__(self, key: str, expected: str, source: str | None = None):
        self.key = key
        self.expected = expected
        self.source = source
        super().__init__(self.line())

    def line(self) -> str:
        where = self.source or "<config>"
        if self.key:
            return f"{where}: {self.key}: {self.expected}"
        return f"{where}: {self.expected}"

    def with_source(self, source: str) -> "InputError":
        """Return the same error attributed to ``source`` (if it had none)."""
        if self.source is None:
            self.source = source
            self.args = (self.line(),)
        return self


class PhysicsError(InputError):
    """The input is well formed but physically impossible (unstable trap,
    crystal not bound at this rotation, ...)."""
