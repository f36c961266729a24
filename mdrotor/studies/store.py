"""Resumable HDF5 storage for sweeps and optimisations.

One output file ``OUT.h5`` that can be opened at any moment, even after a
``kill -9`` or a power cut, and a run that resumes where it stopped.

How it stays consistent: HDF5 cannot be rolled back, and a process killed
while it updates a file in place can leave the file unreadable. So nothing
is ever updated in place:

* every finished entry (a sweep point, an optimiser evaluation, the
  confirmation run) goes into its own small file in the folder
  ``OUT.h5.parts/``: written under a temporary name, its ``complete``
  attribute set last, flushed to disk (fsync) and then renamed, so a part
  file either is complete or does not exist;
* the main file ``OUT.h5`` (the summary table, the provenance, and an
  HDF5 external link ``/points/<index>`` to each finished part) is rewritten
  whole under a temporary name and renamed over the old one: at every
  moment it is either the previous or the next consistent version;
* when every entry is done the parts are copied into the main file
  (``consolidated``: one self-contained file) and the folder is removed.

On a restart the finished entries are read back from the parts (or the
consolidated file); everything else is run again. Only the parent process
writes. An exclusive lock (``OUT.h5.parts/lock``) keeps two processes from
writing the same output.
"""

from __future__ import annotations

import json
import os
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from mdrotor.errors import InputError
from mdrotor.results.result import Result
from mdrotor.results.store import need, need_root_attrs, read_observation, save_result

FORMAT_VERSION = 1
PART_SUFFIX = ".parts"


@dataclass
class Entry:
    """One finished entry: its summary row (metric -> float), its
    attributes (JSON-ready) and, for a failed one, the error message."""

    name: str
    row: dict
    attrs: dict
    error: str = ""

    @property
    def failed(self) -> bool:
        return bool(self.error)


_NOUN = {"sweep": "sweep", "optimize": "optimisation"}  # the kinds of study file, in words
_A_NOUN = {"sweep": "a sweep", "optimize": "an optimisation"}


@dataclass
class EntryStore:
    """Finished entries of a sweep or optimisation on disk.

    Parameters
    ----------
    path : path of the main HDF5 file.
    kind : ``"sweep"`` or ``"optimize"`` (stored; a file of another kind is refused).
    spec_hash : str
        Fingerprint of everything that determines the results; a file
        started from a different fingerprint is refused unless ``restart``.
    restart : bool
        Discard an existing output of this kind and start over.
    """

    path: Path
    kind: str
    spec_hash: str
    restart: bool = False
    entries: dict = field(default_factory=dict)
    consolidated: bool = False
    _last_write: float = 0.0
    _write_cost: float = 0.0
    _lock = None

    def __post_init__(self):
        self.path = Path(self.path)
        self.parts = self.path.with_name(self.path.name + PART_SUFFIX)
        if not self.path.parent.is_dir():
            raise InputError("-o", f"the folder {str(self.path.parent)!r} does not exist", "command line")
        self._open()

    # ------------------------------------------------------------------ open
    def _open(self) -> None:
        import h5py

        src = str(self.path)
        if self.path.exists():
            info = _main_info(self.path)
            if info is None:
                raise InputError("-o", f"{src} exists and is not an mdrotor sweep or optimisation output; choose another file name", "command line")
            if info["kind"] != self.kind:
                raise InputError("-o", f"{src} holds an mdrotor {_NOUN.get(info['kind'], info['kind'])}, not "
                                       f"{_A_NOUN[self.kind]}; choose another file name", "command line")
            if info["spec_hash"] != self.spec_hash and not self.restart:
                raise InputError("-o", f"{src} was started from a different {_NOUN[self.kind]} file or settings (the points changed since the first start); "
                                 "rerun with --restart to discard it and start over, or write to a new -o file", "command line")
        if self.restart:
            self._discard()
        self._take_lock()
        if self.path.exists():
            with h5py.File(self.path, "r") as f:
                self.consolidated = bool(f.attrs.get("consolidated", False))
                if self.consolidated:
                    for name in _entry_names(f):
                        e = _read_entry(f[name], name, self.spec_hash)
                        if e is not None:
                            self.entries[name] = e
        if self.parts.is_dir():
            for p in sorted(self.parts.iterdir()):
                if p.name == "lock":
                    continue
                if not p.name.endswith(".h5") or p.name.startswith("."):
                    p.unlink(missing_ok=True)  # a part cut short by the interruption
                    continue
                try:
                    with h5py.File(p, "r") as f:
                        if f.attrs.get("spec_hash", "") != self.spec_hash:
                            raise InputError("-o", f"{p} belongs to a different {self.kind} (the points changed since the first start); "
                                             "rerun with --restart to discard it and start over, or write to a new -o file", "command line")
                        e = _read_entry(f, str(f.attrs.get("entry_name", "")), self.spec_hash)
                except OSError:
                    e = None
                if e is None:
                    p.unlink(missing_ok=True)
                    continue
                self.entries[e.name] = e

    def _discard(self) -> None:
        if self.path.exists():
            self.path.unlink()
        if self.parts.is_dir():
            shutil.rmtree(self.parts)

    def _take_lock(self) -> None:
        import errno

        self.parts.mkdir(exist_ok=True)
        try:
            import fcntl
        except ImportError:  # not POSIX: no lock
            return
        fd = os.open(self.parts / "lock", os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as e:
            os.close(fd)
            if e.errno in (errno.EAGAIN, errno.EWOULDBLOCK, errno.EACCES):
                raise InputError("-o", f"another mdrotor process is writing {self.path}; wait for it or choose another file name",
                                 "command line") from None
            return  # a file system without locks (some network mounts): go on unlocked
        self._lock = fd

    def close(self) -> None:
        if self._lock is not None:
            os.close(self._lock)
            self._lock = None
        if self.consolidated or (not self.path.exists() and self.parts.is_dir()
                                 and all(p.name == "lock" for p in self.parts.iterdir())):
            shutil.rmtree(self.parts, ignore_errors=True)

    # ----------------------------------------------------------------- write
    def has(self, name: str) -> bool:
        return name in self.entries

    def put(self, name: str, result, row: dict, attrs: dict, error: str = "") -> Entry:
        """Store one finished entry (a :class:`~mdrotor.results.result.Result` or
        ``None`` for a failed one) as a part file, atomically."""
        import h5py


        self.parts.mkdir(exist_ok=True)
        final = self.parts / _part_name(name)
        tmp = self.parts / ("." + _part_name(name) + ".part")
        try:
            if result is not None:
                save_result(result, tmp)
                mode = "r+"
            else:
                mode = "w"
            with h5py.File(tmp, mode) as f:
                f.attrs["entry_name"] = name
                f.attrs["entry_kind"] = self.kind
                f.attrs["spec_hash"] = self.spec_hash
                f.attrs["entry_json"] = json.dumps(attrs)
                f.attrs["error"] = error
                g = f.create_group("metrics")
                for k, v in row.items():
                    g.attrs[k] = float(v)
                f.flush()
                f.attrs["complete"] = True  # written last: the entry counts only once this is there
            _fsync_file(tmp)
            os.replace(tmp, final)
            _fsync_dir(self.parts)
        finally:
            if tmp.exists():
                tmp.unlink()
        e = Entry(name, {k: float(v) for k, v in row.items()}, attrs, error)
        self.entries[name] = e
        return e

    def write_main(self, view, meta: dict, *, force: bool = False, consolidate: bool = False) -> bool:
        """Rewrite the main file: root attributes ``meta``, then ``view(f)``
        writes the workflow's tables, then the entries (links to the parts,
        or copies of them when ``consolidate``).

        Unless ``force``, skips the rewrite when the last one was recent
        (the rewrite then costs at most ~10 % of the wall time); the parts
        are the durable record, so nothing finished is lost by skipping.
        """
        import h5py

        now = time.perf_counter()
        if not (force or consolidate) and now - self._last_write < 10.0 * self._write_cost:
            return False
        tmp = self.path.with_name(f".{self.path.name}.tmp{os.getpid()}")
        try:
            with h5py.File(tmp, "w") as f:
                f.attrs["format_version"] = FORMAT_VERSION
                f.attrs["kind"] = self.kind
                f.attrs["spec_hash"] = self.spec_hash
                for k, v in meta.items():
                    f.attrs[k] = v
                f.attrs["consolidated"] = bool(consolidate)
                f.attrs["n_entries"] = len(self.entries)
                view(f)
                for name in sorted(self.entries):
                    parent, _, leaf = name.rpartition("/")
                    grp = f.require_group(parent) if parent else f
                    part = self.parts / _part_name(name)
                    if consolidate:
                        with h5py.File(part, "r") as src:
                            src.copy(src["/"], grp, name=leaf)
                    else:
                        grp[leaf] = h5py.ExternalLink(f"{self.parts.name}/{part.name}", "/")
            _fsync_file(tmp)
            os.replace(tmp, self.path)
            _fsync_dir(self.path.parent)
        finally:
            if tmp.exists():
                tmp.unlink()
        if consolidate:
            self.consolidated = True
            self.close()
        self._last_write = time.perf_counter()
        self._write_cost = self._last_write - now
        return True


# ---------------------------------------------------------------------------
def _part_name(name: str) -> str:
    return name.replace("/", "-") + ".h5"


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _main_info(path: Path):
    import h5py

    try:
        with h5py.File(path, "r") as f:
            if "kind" not in f.attrs or "spec_hash" not in f.attrs:
                return None
            return {"kind": str(f.attrs["kind"]), "spec_hash": str(f.attrs["spec_hash"])}
    except OSError:
        return None


def _entry_names(f) -> list:
    """Names of the entries embedded in a consolidated main file."""
    import h5py

    names = []
    for top in f:
        g = f[top]
        if not isinstance(g, h5py.Group):
            continue
        if "entry_name" in g.attrs:
            names.append(top)
        elif top == "points":
            names += [f"points/{k}" for k in g if "entry_name" in g[k].attrs]
    return names


def _read_entry(g, name: str, spec_hash: str):
    """An :class:`Entry` from a part file's root or a consolidated group;
    ``None`` when it is not complete."""
    a = g.attrs
    if not bool(a.get("complete", False)) or str(a.get("spec_hash", "")) != spec_hash or not name:
        return None
    row = {k: float(v) for k, v in g["metrics"].attrs.items()} if "metrics" in g else {}
    return Entry(name, row, json.loads(str(a.get("entry_json", "{}"))), str(a.get("error", "")))


def read_result_group(g):
    """A :class:`~mdrotor.results.result.Result` from an HDF5 group laid out like a
    run file (a sweep point or evaluation, linked or consolidated)."""

    need_root_attrs(g)
    attrs = {k: (v.item() if hasattr(v, "item") and np.ndim(v) == 0 else v) for k, v in g.attrs.items()}
    order = [str(n) for n in attrs.get("stage_names", list(need(g, "stages").keys()))]
    stages = {n: read_observation(need(need(g, "stages"), n)) for n in order}
    initial = read_observation(g["initial"]) if "initial" in g else None

    def table(name):
        if name not in g:
            return None
        out = {}
        for k in g[name]:
            v = g[name][k][()]
            if getattr(v, "dtype", None) == object:
                v = [x.decode() if isinstance(x, bytes) else str(x) for x in v]
            out[k] = v
        return out

    extra = {}
    if "metrics" in g:
        extra["metrics"] = {k: float(v) for k, v in g["metrics"].attrs.items()}
    return Result(attrs, initial, stages, table("series"), table("schedule"), extra)
