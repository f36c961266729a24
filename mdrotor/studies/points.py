"""Points of a study: from a sweep or optimisation file to one validated
Config per point.

The study file and its base config (:func:`read_toml`, :func:`resolve_base`,
key and integer checks), dotted-key overrides (:func:`assign`, the same paths
as ``--set``), a point's Config (:func:`build_config`), its seed
(:func:`point_seed`) and entry name (:func:`point_name`), the error of a bad
point naming its axis or parameter (:func:`point_error`), and the memory
check of the points' runs before any work.
"""

from __future__ import annotations

import copy
import inspect
import tomllib
from pathlib import Path

import numpy as np

from mdrotor.config.parse import apply_override, from_dict
from mdrotor.engine.run import check_memory
from mdrotor.errors import InputError
from mdrotor.inputfiles import read_text
from mdrotor.studies.values import show

SEED_LIMIT = 2**64  # as run.seed


def read_toml(path, what: str):
    """(parsed dict, text, source label, folder) of a sweep / optimisation file."""
    p = Path(path)
    src = str(path)
    text = read_text(p, what)
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise InputError("", f"not valid TOML ({e})", src) from None
    return raw, text, src, p.parent


def check_keys(table, section: str, allowed: set, source: str) -> dict:
    if not isinstance(table, dict):
        raise InputError(section, "expected a table", source)
    for k in table:
        if k not in allowed:
            raise InputError(f"{section}.{k}" if section else k, f"unknown key; expected one of {sorted(allowed)}", source)
    return table


def as_int(v, key, src, lo=None, hi=None, what="an integer"):
    if isinstance(v, bool) or not isinstance(v, int) or (lo is not None and v < lo) or (hi is not None and v >= hi):
        raise InputError(key, f"expected {what}, got {v!r}", src)
    return v


def resolve_base(spec: dict, source: str, folder: Path, overrides=()):
    """The base run config of a sweep or optimisation file.

    Returns ``(raw dict, base folder, label, validated Config)``; ``base``
    is a path (relative to the sweep file) or an inline table.
    """

    if "base" not in spec:
        raise InputError("base", "missing; expected the base run config: a path such as \"../demo.toml\" or an inline [base] table", source)
    b = spec["base"]
    if isinstance(b, str):
        p = (folder / b) if not Path(b).is_absolute() else Path(b)
        text = read_text(p, "base config", key="base", source=source)
        try:
            raw = tomllib.loads(text)
        except tomllib.TOMLDecodeError as e:
            raise InputError("", f"not valid TOML ({e})", str(p)) from None
        label, base_dir = str(p), p.parent
    elif isinstance(b, dict):
        raw, label, base_dir = copy.deepcopy(b), f"{source} [base]", folder
    else:
        raise InputError("base", "expected a path to a run config or an inline [base] table", source)
    for ov in overrides:
        apply_override(raw, ov, "--set")
    cfg = from_dict(copy.deepcopy(raw), label, base_dir)
    return raw, base_dir, label, cfg


def assign(raw: dict, key: str, value, source: str) -> None:
    """Set the dotted ``key`` of a run config dict in place.

    Same paths as ``--set``: stages and pinning terms by name
    (``stage.spin-up.duration``, ``pinning.n2.strength``) or index, and list
    items by index anywhere (``stage.spin-up.f_rot.points.2.1``: the value
    of the third knot of a table-shaped ramp).
    """
    parts = key.split(".") if isinstance(key, str) else []
    if not parts or any(not p for p in parts):
        raise InputError(str(key), "expected a dotted key path such as 'trap.f_radial'", source)
    node = raw
    for i, part in enumerate(parts[:-1]):
        here = ".".join(parts[: i + 1])
        if isinstance(node, list):
            node = node[_list_index(node, part, here, source)]
        elif isinstance(node, dict):
            if part not in node:
                if i == 0 and part in ("stage", "pinning"):
                    raise InputError(key, f"the base config has no [{part}]", source)
                node[part] = {}
            node = node[part]
        else:
            raise InputError(key, f"'{'.'.join(parts[:i])}' is a value, not a table or list", source)
    if isinstance(node, list):
        node[_list_index(node, parts[-1], key, source)] = value
    elif isinstance(node, dict):
        node[parts[-1]] = value
    else:
        raise InputError(key, f"'{'.'.join(parts[:-1])}' is a value, not a table or list", source)


def _list_index(items: list, part: str, key: str, source: str) -> int:
    for j, it in enumerate(items):
        if isinstance(it, dict) and (it.get("name") == part or ("name" not in it and part == f"n{it.get('order')}")):
            return j
    if part.isdigit() and int(part) < len(items):
        return int(part)
    names = [it.get("name") for it in items if isinstance(it, dict) and "name" in it]
    have = f"names {names} or " if names else ""
    raise InputError(key, f"no item {part!r}; expected {have}an index below {len(items)}", source)


def build_config(base_raw: dict, assignments, source: str, base_dir, *, trajectories=None, seed=None):
    """Validated Config of the base with ``assignments`` ((key, value), ...)
    set; ``trajectories`` before them (an axis may override it), ``seed`` last."""

    raw = copy.deepcopy(base_raw)
    if trajectories is not None:
        assign(raw, "run.trajectories", trajectories, source)
    for k, v in assignments:
        assign(raw, k, v, source)
    if seed is not None:
        assign(raw, "run.seed", int(seed), source)
    return from_dict(raw, source, base_dir)


def point_seed(base_seed: int, index: int) -> int:
    """Seed of point ``index``: numpy SeedSequence(base_seed, spawn_key=(index,)),
    first 64-bit word, halved into the signed 64-bit range that TOML holds."""
    ss = np.random.SeedSequence(int(base_seed), spawn_key=(int(index),))
    return int(ss.generate_state(1, dtype=np.uint64)[0]) >> 1


def rng_keyword(fn, rng) -> dict:
    """``{"rng": rng}`` for scipy >= 1.15, ``{"seed": rng}`` before (same stream)."""
    return {"rng": rng} if "rng" in inspect.signature(fn).parameters else {"seed": rng}


def point_name(i: int) -> str:
    return f"points/{i:06d}"


def blame(e: InputError, keys) -> list:
    """Indices of the keys (axes, parameters) an error of a point is about."""
    out = []
    for j, k in enumerate(keys):
        if e.key and (e.key == k or e.key.startswith(k + ".") or e.key.startswith(k + "[") or k.startswith(e.key + ".")):
            out.append(j)
    if not out and e.key:
        last = e.key.rsplit(".", 1)[-1]
        out = [j for j, k in enumerate(keys) if k.rsplit(".", 1)[-1] == last]
    return out


def point_error(e: InputError, src: str, keys, vals, where: str, noun: str) -> InputError:
    """The error of one point, naming the axis (parameter) and the point."""
    js = blame(e, keys)
    desc = ", ".join(f"{k} = {show(v)!r}" for k, v in zip(keys, vals))
    who = f"{noun} '{keys[js[0]]}'" if js else {"axis": "axes"}.get(noun, f"{noun}s")
    inner = f"{e.key}: {e.expected}" if e.key else e.expected
    return InputError(f"{who} at {where} ({desc})", inner, src)


def check_points_memory(configs, key: str, source: str) -> None:
    """Refuse, before any work, points whose runs would not fit in memory
    (:func:`mdrotor.engine.run.check_memory`; one check per distinct size)."""

    seen = set()
    for cfg in configs:
        size = (cfg.run.trajectories, len(cfg.masses_kg), len(cfg.schedule.stages) if cfg.schedule else 0, cfg.trap.model,
                bool(cfg.noise))
        if size not in seen:
            seen.add(size)
            check_memory(cfg, cfg.run.trajectories, key, source)
