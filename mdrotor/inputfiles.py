"""Opening the files a user names, with one clear line when they cannot be read.

Text files (run configs, sweep and optimisation files, electrode layouts,
ramp tables) are read with :func:`read_text`; HDF5 files (results, sweeps,
optimisations) are opened with :func:`open_hdf5`. A missing file, a folder,
a file without read permission, a binary file given where text is expected
or a text file given where HDF5 is expected each raise one
:class:`~mdrotor.errors.InputError` naming the file and saying what was
expected, instead of a decoding traceback or the HDF5 library's errno text.
"""

from __future__ import annotations

import os
from pathlib import Path

from mdrotor.errors import InputError

__all__ = ["read_text", "open_hdf5"]


def _unreadable(p: Path) -> str | None:
    """Why a path is not a readable file (None when it is)."""
    if not p.exists():
        return "no such file"
    if p.is_dir():
        return "it is a folder"
    if not os.access(p, os.R_OK):
        return "permission denied"
    return None


def read_text(path, noun: str, *, key: str = "", source: str | None = None) -> str:
    """The UTF-8 text of a file the user named.

    Parameters
    ----------
    path : str or Path
    noun : str
        What kind of file it should be, for the message: ``"config"`` gives
        "cannot read config file: no such file".
    key, source : str, optional
        When the path was given inside another file (a sweep's ``base``, a
        ramp table), the key naming it and that file; the message then names
        both. By default the message is about the file itself.

    Raises
    ------
    InputError
        No such file, a folder, no read permission, or not text (binary, or
        not UTF-8).
    """
    p = Path(path)
    src = source or str(p)
    head = f"cannot read {noun} file" + ("" if source is None else f" {str(p)!r}")
    why = _unreadable(p)
    if why is None:
        try:
            data = p.read_bytes()
        except OSError as e:
            why = e.strerror or str(e)
    if why is not None:
        raise InputError(key, f"{head}: {why}", src)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        raise InputError(key, f"{head}: not a text file (byte 0x{data[e.start]:02x} at offset {e.start} is not UTF-8)",
                         src) from None
    if "\x00" in text:
        raise InputError(key, f"{head}: not a text file (it holds NUL bytes)", src)
    return text


def open_hdf5(path, what: str):
    """Open an HDF5 file the user named, read-only; returns an ``h5py.File``.

    Parameters
    ----------
    path : str or Path
    what : str
        What the file should be, for the message ("an mdrotor result file").

    Raises
    ------
    InputError
        No such file, a folder, no read permission, locked by a writer, or
        not an HDF5 file; one line, without the HDF5 library's errno text.
    """
    import h5py

    p = Path(path)
    why = _unreadable(p)
    if why is not None:
        raise InputError("", f"{why}; expected {what}", str(p))
    try:
        return h5py.File(p, "r")
    except OSError as e:
        text = str(e)
        if "unable to lock" in text.lower():
            raise InputError("", f"locked by another process that is writing it; expected {what} that is complete",
                             str(p)) from None
        if "signature not found" in text.lower():
            raise InputError("", f"not an HDF5 file; expected {what}", str(p)) from None
        # e.g. "Unable to synchronously open file (truncated file: eof = 96, ...)": keep the part in parentheses
        reason = text[text.find("(") + 1:text.rfind(")")] if "(" in text and ")" in text else text
        raise InputError("", f"cannot be read as HDF5 ({reason}); expected {what}", str(p)) from None
