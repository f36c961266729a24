"""Parameter sweeps: many full runs over a grid, a zip or a sample of
config values, resumable after any interruption.

A sweep file (TOML) names a base run config and one or more axes over
dotted config keys (the same paths as ``--set``)::

    base = "../two_ion_quadrupole.toml"   # or an inline [base] table
    combine = "grid"                      # grid (product) | zip | sample
    seed = 7                              # base seed (default: the base config's run.seed)
    trajectories = 100                    # per point (default: the base config's)

    [[axis]]
    key = "stage.spin-up.duration"
    values = ["1 ms", "2 ms", "4 ms"]

    [[axis]]
    key = "pinning.strength"
    range = { from = "1e5 V/m^2", to = "4e5 V/m^2", num = 4, spacing = "log" }

With ``combine = "sample"`` every axis gives ``bounds = [lo, hi]`` (and
optionally ``scale = "log"``) and a ``[sample]`` table chooses the method
(``"sobol"`` or ``"lhs"``, scipy.stats.qmc), the number of ``points`` and
the sampler's ``seed``.

Every point is a full run of its own config; its seed comes from (base
seed, point index) through numpy's SeedSequence, so the results do not
depend on the executor, the number of workers, the order in which points
finish, or on an interruption and resume. Storage: :mod:`mdrotor.studies.store`.
"""

from __future__ import annotations

import hashlib
import json
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from mdrotor.engine.executors import SerialExecutor, make_executor
from mdrotor.errors import InputError
from mdrotor.numfmt import MISSING, interval, plain, value_err
from mdrotor.studies.metrics import point_metrics
from mdrotor.studies.points import (
    SEED_LIMIT,
    as_int,
    build_config,
    check_keys,
    point_error,
    point_name,
    point_seed,
    read_toml,
    resolve_base,
    rng_keyword,
)
from mdrotor.studies.store import EntryStore
from mdrotor.studies.table import read_table, write_axis, write_summary
from mdrotor.studies.tasks import Task
from mdrotor.studies.values import bounds, convert, quantity, scaled, show, with_unit
from mdrotor.version import __version__

SWEEP_KEYS = {"base", "combine", "seed", "seeding", "trajectories", "axis", "sample", "description"}
AXIS_KEYS = {"key", "values", "range", "bounds", "scale"}
RANGE_KEYS = {"from", "to", "num", "spacing"}
SAMPLE_KEYS = {"method", "points", "seed"}
COMBINE = ("grid", "zip", "sample")
SAMPLERS = ("sobol", "lhs")


@dataclass
class Axis:
    key: str
    values: list = field(default_factory=list)  # grid / zip: config values
    lo: float = 0.0  # sample: bounds (magnitudes in ``unit``)
    hi: float = 0.0
    unit: str | None = None
    log: bool = False


@dataclass
class SweepSpec:
    """A validated sweep: its axes, points (one tuple of config values
    each), their configs and seeds, and the fingerprint of it all."""

    source: str
    text: str
    base_text: str
    combine: str
    seeding: str
    base_seed: int
    axes: list
    points: list
    configs: list
    seeds: list
    hash: str
    base_names: dict = field(default_factory=dict)  # Config.names() of the base config

    @property
    def keys(self) -> list:
        return [a.key for a in self.axes]

    def meta(self) -> dict:
        return {"package_version": __version__, "source": self.source, "sweep_text": self.text,
                "base_config_text": self.base_text, "base_config_names": json.dumps(self.base_names),
                "combine": self.combine, "seeding": self.seeding,
                "base_seed": np.uint64(self.base_seed), "n_points": len(self.points), "axis_keys": self.keys}


def load_sweep(path, overrides=(), trajectories: int | None = None) -> SweepSpec:
    """Read and validate a sweep file, and every point's config.

    ``overrides`` (``--set``) apply to the base config; ``trajectories``
    replaces the file's trajectories per point. Raises
    :class:`InputError` naming the axis and the point of the first bad one.
    """
    spec, text, src, folder = read_toml(path, "sweep")
    check_keys(spec, "", SWEEP_KEYS, src)
    base_raw, base_dir, _label, base_cfg = resolve_base(spec, src, folder, overrides)
    combine = spec.get("combine", "grid")
    if combine not in COMBINE:
        raise InputError("combine", f"expected one of {list(COMBINE)}, got {combine!r}", src)
    seeding = spec.get("seeding", "per-point")
    if seeding not in ("per-point", "common"):
        raise InputError("seeding", f"expected 'per-point' or 'common', got {seeding!r}", src)
    base_seed = as_int(spec.get("seed", base_cfg.run.seed), "seed", src, 0, SEED_LIMIT, "a non-negative seed below 2^64")
    traj = spec.get("trajectories")
    if traj is not None:
        traj = as_int(traj, "trajectories", src, 1, None, "a number of trajectories per point")
    if trajectories is not None:
        traj = as_int(trajectories, "--trajectories", "command line", 1, None, "a number of trajectories per point")
    axes_raw = spec.get("axis")
    if not isinstance(axes_raw, list) or not axes_raw or not all(isinstance(a, dict) for a in axes_raw):
        raise InputError("axis", "expected one or more [[axis]] tables with a 'key' and 'values', 'range' or 'bounds'", src)
    axes = [_axis(a, j, combine, src) for j, a in enumerate(axes_raw)]
    keys = [a.key for a in axes]
    dup = {k for k in keys if keys.count(k) > 1}
    if dup:
        raise InputError("axis", f"each key may have one axis; repeated: {sorted(dup)}", src)
    if combine == "grid":
        import itertools

        points = [tuple(p) for p in itertools.product(*[a.values for a in axes])]
    elif combine == "zip":
        lengths = [len(a.values) for a in axes]
        if len(set(lengths)) != 1:
            raise InputError("axis", f"combine = 'zip' needs axes of equal length, got {dict(zip(keys, lengths))}", src)
        points = list(zip(*[a.values for a in axes]))
    else:
        points = _sample(spec, axes, base_seed, src)
    if "sample" in spec and combine != "sample":
        raise InputError("sample", "a [sample] table needs combine = 'sample'", src)
    seeds = [base_seed if seeding == "common" else point_seed(base_seed, i) for i in range(len(points))]
    configs = []
    for i, vals in enumerate(points):
        try:
            cfg = build_config(base_raw, list(zip(keys, vals)), f"{src} point {i}", base_dir, trajectories=traj, seed=seeds[i])
        except InputError as e:
            raise point_error(e, src, keys, vals, f"point {i}", "axis") from None
        configs.append(cfg)
    digest = hashlib.sha256(json.dumps({"kind": "sweep", "combine": combine, "axes": keys,
                                        "points": [c.text for c in configs]}).encode()).hexdigest()
    return SweepSpec(src, text, base_cfg.text, combine, seeding, base_seed, axes, points, configs, seeds, digest,
                     base_names=base_cfg.names())


def _axis(a: dict, j: int, combine: str, src: str) -> Axis:
    sec = f"axis[{j}]"
    check_keys(a, sec, AXIS_KEYS, src)
    key = a.get("key")
    if not isinstance(key, str) or not key or any(not p for p in key.split(".")):
        raise InputError(f"{sec}.key", "expected a dotted config key such as 'stage.spin-up.duration'", src)
    sec = f"axis '{key}'"
    if key == "run.seed":
        raise InputError(f"{sec}", "seeds are derived per point from the sweep's 'seed'; use seeding = 'common' for one seed at every point", src)
    given = [k for k in ("values", "range", "bounds") if k in a]
    if combine == "sample":
        if given != ["bounds"]:
            raise InputError(sec, "combine = 'sample' needs 'bounds' = [low, high] on every axis (and no 'values' or 'range')", src)
    elif len(given) != 1 or given == ["bounds"]:
        raise InputError(sec, "expected exactly one of 'values' (a list) or 'range' (a table {from, to, num, spacing}); "
                              "'bounds' needs combine = 'sample'", src)
    scale = a.get("scale", "linear")
    if scale not in ("linear", "log"):
        raise InputError(f"{sec}.scale", f"expected 'linear' or 'log', got {scale!r}", src)
    if "scale" in a and "bounds" not in a:
        raise InputError(f"{sec}.scale", "'scale' goes with 'bounds'; a range has 'spacing'", src)
    if "values" in a:
        vals = a["values"]
        if not isinstance(vals, list) or not vals:
            raise InputError(f"{sec}.values", "expected a non-empty list of config values", src)
        return Axis(key, list(vals))
    if "range" in a:
        return Axis(key, _range(a["range"], f"{sec}.range", src), log=a["range"].get("spacing") == "log")
    lo, hi, unit, log = bounds(a["bounds"], scale, f"{sec}.bounds", src)
    return Axis(key, [], lo, hi, unit, log)


def _range(r, key: str, src: str) -> list:
    check_keys(r, key, RANGE_KEYS, src)
    for k in ("from", "to", "num"):
        if k not in r:
            raise InputError(f"{key}.{k}", "missing; a range is {from, to, num, spacing}", src)
    num = as_int(r["num"], f"{key}.num", src, 1, None, "a number of values >= 1")
    spacing = r.get("spacing", "linear")
    if spacing not in ("linear", "log"):
        raise InputError(f"{key}.spacing", f"expected 'linear' or 'log', got {spacing!r}", src)
    a, unit = quantity(r["from"], f"{key}.from", src)
    b = convert(r["to"], unit, f"{key}.to", src)
    if spacing == "log":
        if a <= 0 or b <= 0:
            raise InputError(f"{key}.spacing", "spacing = 'log' needs positive from and to", src)
        mags = np.geomspace(a, b, num)
    else:
        mags = np.linspace(a, b, num)
    if unit is None and all(isinstance(r[k], int) and not isinstance(r[k], bool) for k in ("from", "to")) \
            and all(float(m).is_integer() for m in mags):
        return [int(m) for m in mags]
    return [with_unit(float(m), unit) for m in mags]


def _sample(spec: dict, axes: list, base_seed: int, src: str) -> list:
    from scipy.stats import qmc

    s = check_keys(spec.get("sample", None) if "sample" in spec else _missing_sample(src), "sample", SAMPLE_KEYS, src)
    method = s.get("method", "sobol")
    if method not in SAMPLERS:
        raise InputError("sample.method", f"expected one of {list(SAMPLERS)}, got {method!r}", src)
    n = as_int(s.get("points"), "sample.points", src, 1, None, "a number of points >= 1")
    seed = as_int(s.get("seed", base_seed), "sample.seed", src, 0, SEED_LIMIT, "a non-negative seed")
    d = len(axes)
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    cls = qmc.Sobol if method == "sobol" else qmc.LatinHypercube
    engine = cls(d, scramble=True, **rng_keyword(cls, rng))
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # Sobol' balance warning for n not a power of 2
        u = engine.random(n)
    pts = []
    for row in u:
        pts.append(tuple(with_unit(scaled(a, float(x)), a.unit) for a, x in zip(axes, row)))
    return pts


def _missing_sample(src):
    raise InputError("sample", "combine = 'sample' needs a [sample] table with method ('sobol' or 'lhs') and points", src)


def run_sweep(spec, output, *, workers: int | None = None, scheduler: str | None = None, restart: bool = False,
              progress: bool = False, executor=None, overrides=()) -> dict:
    """Run (or resume) a sweep into ``output`` (HDF5).

    Parameters
    ----------
    spec : SweepSpec or path of a sweep file
    output : path of the HDF5 file (resumed when it holds this sweep)
    workers : local worker processes (default one per core; 1 runs in this process)
    scheduler : address of a Dask distributed scheduler (instead of local processes)
    restart : discard an existing output (also one from a changed sweep file)
    progress : tqdm bar over points on stderr
    executor : an executor object (see :mod:`mdrotor.engine.executors`), overriding
        ``workers``/``scheduler``; it is not closed here.

    Returns
    -------
    dict with ``points``, ``completed``, ``failed``, ``resumed``, ``ran``, ``wall_s``.
    """

    t0 = time.perf_counter()
    if not isinstance(spec, SweepSpec):
        spec = load_sweep(spec, overrides)
    n = len(spec.points)
    store = EntryStore(Path(output), "sweep", spec.hash, restart)
    ex = None
    ran = 0
    try:
        todo = [i for i in range(n) if not store.has(point_name(i))]
        resumed = n - len(todo)
        meta = spec.meta()

        def view(f):
            _sweep_view(f, spec, store)

        if todo:
            ex = executor if executor is not None else make_executor(workers, scheduler, len(todo))
            store.write_main(view, {**meta, "finished": False}, force=True)
            inline = isinstance(ex, SerialExecutor)
            bar = _bar(progress, n, resumed, "mdrotor sweep", "pt")
            tasks = [Task(point_name(i), spec.configs[i], progress=progress and inline) for i in todo]
            try:
                for out in ex.run(tasks):
                    i = int(out.name.rsplit("/", 1)[1])
                    attrs = {"index": i, "seed": spec.seeds[i], "values": [show(v) for v in spec.points[i]]}
                    if out.error:
                        store.put(out.name, None, {}, attrs, out.error)
                    else:
                        store.put(out.name, out.result, point_metrics(out.result, spec.configs[i]), attrs)
                    ran += 1
                    store.write_main(view, {**meta, "finished": False})
                    if bar is not None:
                        bar.update(1)
            except BaseException:
                if ex is not executor:
                    ex.close(abort=True)
                    ex = None
                store.write_main(view, {**meta, "finished": False}, force=True)
                raise
            finally:
                if bar is not None:
                    bar.close()
        if not store.consolidated:
            store.write_main(view, {**meta, "finished": True}, consolidate=True)
    finally:
        if ex is not None and ex is not executor:
            ex.close()
        store.close()
    failed = sum(1 for e in store.entries.values() if e.failed)
    return {"output": str(output), "points": n, "completed": len(store.entries), "failed": failed,
            "resumed": resumed, "ran": ran, "wall_s": time.perf_counter() - t0}


def _bar(progress: bool, total: int, initial: int, desc: str, unit: str):
    if not progress:
        return None
    from tqdm import tqdm

    return tqdm(total=total, initial=initial, desc=desc, unit=unit, file=sys.stderr, dynamic_ncols=True)


def _sweep_view(f, spec: SweepSpec, store) -> None:
    n = len(spec.points)
    ax = f.create_group("axes")
    for j, a in enumerate(spec.axes):
        write_axis(ax, j, a.key, [p[j] for p in spec.points], a.log)
    write_summary(f, n, [point_name(i) for i in range(n)], store.entries, np.array(spec.seeds, dtype=np.uint64))


# the sweep's text table: (heading, metric, its error or its interval's bounds)
TEXT_COLUMNS = [("L mean (hbar)", "L_mean_hbar", ("L_mean_err_hbar",)),
                ("L spread (hbar)", "L_std_hbar", ("L_std_err_hbar",)),
                ("slipped", "slip_fraction", ("slip_fraction_lo", "slip_fraction_hi")),
                ("lost", "loss_fraction", ("loss_fraction_lo", "loss_fraction_hi")),
                ("diff. phonons", "differential_n_mean", ("differential_n_err",)),
                ("used", "n_ok", ())]


def _cell(t: dict, i: int, metric: str, errs: tuple) -> str:
    m = t["metrics"]
    if metric not in m or not np.isfinite(m[metric][i]):
        return MISSING
    if metric == "n_ok":
        tot = m.get("n_trajectories")
        return f"{int(m[metric][i])}" + (f"/{int(tot[i])}" if tot is not None and np.isfinite(tot[i]) else "")
    if len(errs) == 2:
        return interval(m[metric][i], *(m[e][i] if e in m else np.nan for e in errs))
    return value_err(m[metric][i], m[errs[0]][i] if errs[0] in m else np.nan)


def sweep_text(path, summ: dict, max_rows: int = 40) -> str:
    """The sweep's summary table: each statistic with its standard error,
    each fraction with its Wilson 68 % interval [lo, hi], and how many
    trajectories were used (finite and bound)."""

    t = read_table(path)
    lines = [f"sweep: {summ['points']} point{'' if summ['points'] == 1 else 's'} ({summ['resumed']} already done, {summ['ran']} run now, "
             f"{summ['failed']} failed) -> {path}  [{plain(summ['wall_s'], 3)} s]",
             "final stage: statistics +- standard error over the finite, bound trajectories ('used'); "
             "fractions of all trajectories with Wilson 68 % intervals [lo, hi]"]
    keys = list(t["axes"])
    cols = [c for c in TEXT_COLUMNS if c[1] in t["metrics"]]
    rows = []
    for i in range(min(len(t["index"]), max_rows)):
        vals = [str(i), *[t["axes"][k]["text"][i] for k in keys]]
        if t["failed"][i]:
            vals.append("failed: " + t["error"][i])
        elif not t["complete"][i]:
            vals.append("not run yet")
        else:
            vals += [_cell(t, i, m, e) for _h, m, e in cols]
        rows.append(vals)
    head = ["point", *keys, *[h for h, _m, _e in cols]]
    widths = [max([len(head[j])] + [len(r[j]) for r in rows if j < len(r) and not r[-1].startswith(("failed", "not run"))])
              for j in range(len(head))]
    lines.append("  " + "  ".join(f"{h:>{w}s}" for h, w in zip(head, widths)))
    for vals in rows:
        lines.append("  " + "  ".join(f"{v:>{w}s}" for v, w in zip(vals, widths + [0])))
    if len(t["index"]) > max_rows:
        lines.append(f"  ... {len(t['index']) - max_rows} more rows (--csv FILE writes them all)")
    return "\n".join(lines)
