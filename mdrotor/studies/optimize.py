"""Ramp optimisation: a derivative-free search over config values for the
ramp with the best declared objective, resumable like a sweep.

An optimisation file (TOML)::

    base = "../two_ion_quadrupole.toml"    # path or inline [base] table
    trajectories = 64                      # per evaluation
    seed = 11                              # common random numbers: the same
                                           # trajectory seeds at every evaluation
    [optimizer]
    method = "nelder-mead"                 # or "differential-evolution"
    budget = 60                            # most evaluations

    [[parameter]]
    key = "stage.spin-up.duration"
    bounds = ["0.5 ms", "3 ms"]
    start = "2 ms"

    [[objective]]                          # minimise the weighted sum
    metric = "L_std_hbar"
    weight = 1.0

    [[constraint]]
    metric = "slip_fraction"
    max = 0.0

    [confirm]
    trajectories = 400                     # re-run of the best point, fresh seeds

The objective is ``sum_j weight_j * m_j`` (or ``weight_j * |m_j - target_j|``
with a ``target``) over named metrics of :func:`mdrotor.studies.metrics.point_metrics`;
each violated constraint adds ``penalty * violation / |limit|`` (``penalty``
default 1e3; the violation itself when the limit is 0). Nothing in the file
is evaluated as code.

Reproducibility and resuming: every evaluation uses the same ``seed``
(common random numbers), so the objective is a deterministic, smooth
function of the parameters; the optimiser's own randomness comes from
``optimizer.seed``. Rerunning the same command after an interruption replays
the optimiser from the stored evaluations (their parameters must match bit
for bit) and computes only the missing ones.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from mdrotor.engine.executors import make_executor
from mdrotor.errors import InputError
from mdrotor.numfmt import clean, interval, plain, value_err
from mdrotor.studies.metrics import (
    RUN_METRICS,
    err_name,
    known_metric,
    metric_parser,
    point_metrics,
    summary_metric_names,
)
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
from mdrotor.studies.table import write_axis, write_summary
from mdrotor.studies.tasks import Task
from mdrotor.studies.values import bounds, convert, scaled, show, with_unit
from mdrotor.version import __version__

TOP_KEYS = {"base", "trajectories", "seed", "penalty", "parameter", "objective", "constraint", "optimizer", "confirm", "description"}
PARAM_KEYS = {"key", "bounds", "start", "scale"}
OBJ_KEYS = {"metric", "weight", "target"}
CON_KEYS = {"metric", "max", "min"}
OPT_KEYS = {"method", "budget", "seed", "popsize", "tol", "atol", "xatol", "fatol", "initial_step"}
CONFIRM_KEYS = {"trajectories", "seed"}
METHODS = ("nelder-mead", "differential-evolution")
FAIL_VALUE = 1e30  # what the optimiser is told for a point without an objective (finite, so its statistics stay
                   # finite); the table stores NaN there


@dataclass
class Parameter:
    key: str
    lo: float
    hi: float
    unit: str | None
    log: bool
    start_u: float | None

    def value(self, u: float):
        """Config value at unit-cube coordinate u, to 15 significant digits
        (``28.875 us``, not ``28.874999999999996 us``: the run uses exactly
        the value written)."""

        return with_unit(clean(scaled(self, min(1.0, max(0.0, float(u))))), self.unit, None)


@dataclass
class Term:
    metric: str
    weight: float
    target: float | None


@dataclass
class Constraint:
    metric: str
    lo: float | None
    hi: float | None


@dataclass
class OptimizeSpec:
    """A validated optimisation file."""

    source: str
    text: str
    base_raw: dict
    base_dir: object
    base_text: str
    trajectories: int | None
    seed: int
    penalty: float
    params: list
    terms: list
    constraints: list
    method: str
    budget: int
    opt_seed: int
    popsize: int
    tol: float
    atol: float
    xatol: float
    fatol: float
    initial_step: float
    confirm_trajectories: int
    confirm_seed: int
    hash: str
    base_names: dict = field(default_factory=dict)  # Config.names() of the base config

    @property
    def keys(self) -> list:
        return [p.key for p in self.params]

    def config(self, values, k, *, trajectories=None, seed=None):
        src = f"{self.source} evaluation {k}" if isinstance(k, int) else f"{self.source} {k}"
        return build_config(self.base_raw, list(zip(self.keys, values)), src, self.base_dir,
                            trajectories=self.trajectories if trajectories is None else trajectories,
                            seed=self.seed if seed is None else seed)

    def objective(self, m: dict):
        """(objective, penalty part, feasible) of a metrics row; (NaN, NaN,
        False) when a metric it is made of has no value (NaN or absent: a run
        without usable trajectories has no L mean), so that the table never
        holds a stand-in number."""
        if any(not math.isfinite(m.get(t.metric, math.nan)) for t in [*self.terms, *self.constraints]):
            return math.nan, math.nan, False
        total = 0.0
        for t in self.terms:
            v = m.get(t.metric, math.nan)
            total += t.weight * (v if t.target is None else abs(v - t.target))
        pen = 0.0
        for c in self.constraints:
            v = m.get(c.metric, math.nan)
            for lim, excess in ((c.hi, v - c.hi if c.hi is not None else 0.0), (c.lo, c.lo - v if c.lo is not None else 0.0)):
                if lim is not None and not excess <= 0.0:  # NaN counts as violated
                    pen += (excess if math.isfinite(excess) else FAIL_VALUE) / (abs(lim) if lim != 0 else 1.0)
        value = total + self.penalty * pen
        if not math.isfinite(value):  # finite terms whose weighted sum overflows
            return math.nan, pen, False
        return min(value, FAIL_VALUE), pen, pen == 0.0

    def meta(self) -> dict:
        return {"package_version": __version__, "source": self.source, "optimize_text": self.text,
                "base_config_text": self.base_text, "base_config_names": json.dumps(self.base_names), "method": self.method, "budget": self.budget,
                "seed": np.uint64(self.seed), "optimizer_seed": np.uint64(self.opt_seed),
                "confirm_seed": np.uint64(self.confirm_seed), "confirm_trajectories": self.confirm_trajectories,
                "parameter_keys": self.keys, "axis_keys": self.keys,
                "objective": json.dumps([t.__dict__ for t in self.terms]),
                "constraints": json.dumps([c.__dict__ for c in self.constraints]), "penalty": self.penalty}


def load_optimize(path, overrides=()) -> OptimizeSpec:
    """Read and validate an optimisation file (raises :class:`InputError`)."""
    spec, text, src, folder = read_toml(path, "optimisation")
    check_keys(spec, "", TOP_KEYS, src)
    base_raw, base_dir, _label, base_cfg = resolve_base(spec, src, folder, overrides)
    traj = spec.get("trajectories")
    if traj is not None:
        traj = as_int(traj, "trajectories", src, 1, None, "a number of trajectories per evaluation")
    seed = as_int(spec.get("seed", base_cfg.run.seed), "seed", src, 0, SEED_LIMIT, "a non-negative seed below 2^64")
    penalty = _number(spec.get("penalty", 1e3), "penalty", src, positive=True)
    # parameters
    praw = spec.get("parameter")
    if not isinstance(praw, list) or not praw or not all(isinstance(p, dict) for p in praw):
        raise InputError("parameter", "expected one or more [[parameter]] tables with 'key' and 'bounds'", src)
    params = []
    for j, p in enumerate(praw):
        check_keys(p, f"parameter[{j}]", PARAM_KEYS, src)
        key = p.get("key")
        if not isinstance(key, str) or not key or any(not s for s in key.split(".")):
            raise InputError(f"parameter[{j}].key", "expected a dotted config key such as 'stage.spin-up.duration'", src)
        sec = f"parameter '{key}'"
        if key in ("run.seed", "run.trajectories"):
            raise InputError(sec, "seed and trajectories are set by the optimisation file's 'seed' and 'trajectories'", src)
        if "bounds" not in p:
            raise InputError(f"{sec}.bounds", "missing; expected [low, high], e.g. [\"1 ms\", \"3 ms\"]", src)
        scale = p.get("scale", "linear")
        if scale not in ("linear", "log"):
            raise InputError(f"{sec}.scale", f"expected 'linear' or 'log', got {scale!r}", src)
        lo, hi, unit, log = bounds(p["bounds"], scale, f"{sec}.bounds", src)
        start_u = None
        if "start" in p:
            s = convert(p["start"], unit, f"{sec}.start", src)
            if not lo <= s <= hi:
                raise InputError(f"{sec}.start", f"expected a start within the bounds {p['bounds']!r}, got {p['start']!r}", src)
            start_u = math.log(s / lo) / math.log(hi / lo) if log else (s - lo) / (hi - lo)
        params.append(Parameter(key, lo, hi, unit, log, start_u))
    keys = [p.key for p in params]
    dup = {k for k in keys if keys.count(k) > 1}
    if dup:
        raise InputError("parameter", f"each key may be one parameter; repeated: {sorted(dup)}", src)
    # optimiser settings
    o = check_keys(spec.get("optimizer", {}), "optimizer", OPT_KEYS, src)
    method = o.get("method", "nelder-mead")
    if method not in METHODS:
        raise InputError("optimizer.method", f"expected one of {list(METHODS)}, got {method!r}", src)
    budget = as_int(o.get("budget", 100), "optimizer.budget", src, 2, None, "a budget of at least 2 evaluations")
    opt_seed = as_int(o.get("seed", seed), "optimizer.seed", src, 0, SEED_LIMIT, "a non-negative seed")
    popsize = as_int(o.get("popsize", 8), "optimizer.popsize", src, 1, None, "a population multiplier >= 1")
    if method == "differential-evolution" and max(5, popsize * len(params)) > budget:
        raise InputError("optimizer.budget", f"differential evolution needs a budget of at least one population "
                                             f"({max(5, popsize * len(params))} evaluations)", src)
    tol = _number(o.get("tol", 0.01), "optimizer.tol", src)
    atol = _number(o.get("atol", 0.0), "optimizer.atol", src)
    xatol = _number(o.get("xatol", 1e-3), "optimizer.xatol", src, positive=True)
    fatol = _number(o.get("fatol", math.inf), "optimizer.fatol", src, allow_inf=True)
    step = _number(o.get("initial_step", 0.1), "optimizer.initial_step", src, positive=True)
    if step > 0.5:
        raise InputError("optimizer.initial_step", "expected a step in the unit cube of the bounds, at most 0.5", src)
    # confirmation run
    c = check_keys(spec.get("confirm", {}), "confirm", CONFIRM_KEYS, src)
    ctraj = as_int(c.get("trajectories", 4 * (traj or base_cfg.run.trajectories)), "confirm.trajectories", src, 1, None,
                 "a number of trajectories")
    cseed = as_int(c.get("seed", point_seed(seed, 1)), "confirm.seed", src, 0, SEED_LIMIT, "a non-negative seed")
    if cseed == seed:
        raise InputError("confirm.seed", "the confirmation run needs fresh seeds: choose a seed other than the evaluations' seed", src)
    # every parameter at its bounds and start must make a valid config
    for which in ("lo", "hi", "start"):
        us = [0.0 if which == "lo" else 1.0 if which == "hi" else (p.start_u if p.start_u is not None else 0.5) for p in params]
        vals = [p.value(u) for p, u in zip(params, us)]
        try:
            cfg = build_config(base_raw, list(zip(keys, vals)), src, base_dir, trajectories=traj, seed=seed)
        except InputError as e:
            where = {"lo": "the lower bounds", "hi": "the upper bounds", "start": "the start"}[which]
            raise point_error(e, src, keys, vals, where, "parameter") from None
    terms, constraints = _objective(spec, src, cfg)
    canon = json.dumps({"kind": "optimize", "spec": {k: v for k, v in spec.items() if k != "base"},
                        "base": base_cfg.text}, sort_keys=True, default=str)
    digest = hashlib.sha256(canon.encode()).hexdigest()
    return OptimizeSpec(src, text, base_raw, base_dir, base_cfg.text, traj, seed, penalty, params, terms, constraints,
                        method, budget, opt_seed, popsize, tol, atol, xatol, fatol, step, ctraj, cseed, digest,
                        base_names=base_cfg.names())


def _number(v, key, src, positive=False, allow_inf=False):
    if isinstance(v, bool) or not isinstance(v, (int, float)) or math.isnan(v) or (positive and not v > 0) \
            or (math.isinf(v) and not allow_inf):
        raise InputError(key, f"expected a {'positive ' if positive else ''}{'' if allow_inf else 'finite '}number, got {v!r}", src)
    return float(v)


def _objective(spec, src, cfg):
    def metric_of(t, sec):
        m = t.get("metric")
        if not isinstance(m, str) or not m:
            raise InputError(f"{sec}.metric", "expected a metric name such as 'L_std_hbar'", src)
        if m == "wall_s":
            raise InputError(f"{sec}.metric", "wall_s is not reproducible; use duration_s or n_steps for the cost of a ramp", src)
        if not known_metric(m, cfg):
            stages = [s.name for s in cfg.schedule.stages]
            raise InputError(f"{sec}.metric", f"unknown metric {m!r}; expected one of {summary_metric_names() + list(RUN_METRICS)}, "
                                              f"'mode_n_mean.<mode label>', 'pinning_peak.<term>' or 'stage.<name>.<metric>' with stages {stages}", src)
        return m

    oraw = spec.get("objective")
    if isinstance(oraw, dict):
        oraw = [oraw]
    if not isinstance(oraw, list) or not oraw or not all(isinstance(t, dict) for t in oraw):
        raise InputError("objective", "expected one or more [[objective]] tables with a 'metric' and a 'weight'", src)
    terms = []
    for j, t in enumerate(oraw):
        sec = f"objective[{j}]"
        check_keys(t, sec, OBJ_KEYS, src)
        m = metric_of(t, sec)
        w = _number(t.get("weight", 1.0), f"{sec}.weight", src)
        target = metric_parser(m, cfg)(t["target"], f"{sec}.target", src) if "target" in t else None
        terms.append(Term(m, w, target))
    craw = spec.get("constraint", [])
    if isinstance(craw, dict):
        craw = [craw]
    if not isinstance(craw, list) or not all(isinstance(c, dict) for c in craw):
        raise InputError("constraint", "expected [[constraint]] tables with a 'metric' and 'max' and/or 'min'", src)
    cons = []
    for j, c in enumerate(craw):
        sec = f"constraint[{j}]"
        check_keys(c, sec, CON_KEYS, src)
        m = metric_of(c, sec)
        if "max" not in c and "min" not in c:
            raise InputError(sec, "expected a limit 'max' and/or 'min'", src)
        parse = metric_parser(m, cfg)
        hi = parse(c["max"], f"{sec}.max", src) if "max" in c else None
        lo = parse(c["min"], f"{sec}.min", src) if "min" in c else None
        if hi is not None and lo is not None and lo > hi:
            raise InputError(sec, "expected min <= max", src)
        cons.append(Constraint(m, lo, hi))
    return terms, cons


# ---------------------------------------------------------------------------
class _Budget(Exception):
    """The evaluation budget is used up."""


# an optimiser that keeps asking for known points stops after this many asks per budgeted evaluation
MAX_ASKS_PER_EVALUATION = 50


class _Evaluator:
    """Evaluates batches of unit-cube points: stored ones are replayed,
    new ones run through the executor and stored.

    With common random numbers a point's objective is a deterministic
    function of the point, so a point asked again (bit for bit the same
    unit-cube coordinates; Nelder-Mead does this after a shrink or at a
    bound) is answered from the earlier evaluation: it is neither run nor
    stored, and does not count against the budget (``repeats`` counts them).
    """

    def __init__(self, spec: OptimizeSpec, store, make_ex, bar, view, meta):
        self.spec, self.store, self.make_ex, self.bar, self.view, self.meta = spec, store, make_ex, bar, view, meta
        self.count = 0      # new evaluations: the budget's count
        self.asks = 0       # points asked, repeats included
        self.repeats = 0
        self.known: dict = {}  # unit-cube point -> entry name
        self.ex = None
        self.checked = False

    def __call__(self, U) -> list:
        spec, store = self.spec, self.store
        names, tasks, pending = [], [], {}
        for u in U:
            u = [float(x) for x in np.atleast_1d(np.asarray(u, dtype=float))]
            self.asks += 1
            if self.asks > MAX_ASKS_PER_EVALUATION * spec.budget:
                raise _Budget
            key = tuple(u)
            if key in self.known:  # the same point again: the same value, no new run
                self.repeats += 1
                names.append(self.known[key])
                continue
            if self.count >= spec.budget:
                raise _Budget
            k = self.count
            self.count += 1
            name = point_name(k)
            names.append(name)
            self.known[key] = name
            if store.has(name):
                if store.entries[name].attrs.get("u") != u:
                    raise InputError("-o", f"the stored evaluation {k} does not replay (its parameters differ); "
                                           "rerun with --restart to start over", "command line")
                self._tick()
                continue
            vals = [p.value(x) for p, x in zip(spec.params, u)]
            attrs = {"index": k, "u": u, "values": [show(v) for v in vals], "seed": spec.seed}
            try:
                cfg = spec.config(vals, k)
            except InputError as e:  # e.g. a discontinuous schedule at these values: a failed evaluation
                store.put(name, None, _fail_row(), attrs, point_error(e, spec.source, spec.keys, vals, f"evaluation {k}", "parameter").line())
                self._tick()
                continue
            tasks.append(Task(name, cfg))
            pending[name] = (cfg, attrs)
        if tasks:
            if self.ex is None:
                self.ex = self.make_ex()
            for out in self.ex.run(tasks):
                cfg, attrs = pending.pop(out.name)
                if out.error:
                    store.put(out.name, None, _fail_row(), attrs, out.error)
                else:
                    m = point_metrics(out.result, cfg)
                    if not self.checked:
                        self._check(m)
                    val, pen, feas = spec.objective(m)
                    store.put(out.name, out.result, {**m, "objective": val, "penalty": pen, "feasible": float(feas)}, attrs)
                store.write_main(self.view, self.meta())
                self._tick()
        return [for_optimizer(store.entries[n].row.get("objective")) for n in names]

    def _tick(self):
        if self.bar is not None:
            self.bar.update(1)

    def _check(self, m: dict) -> None:
        """Mode labels are known once a run exists: refuse one the run has not
        (the other names were checked with the file; a run without usable
        trajectories lacks its L statistics, which is no error of the file)."""
        self.checked = True
        for j, t in enumerate([*self.spec.terms, *self.spec.constraints]):
            if t.metric.startswith(("mode_n_mean.", "mode_n_err.")) and t.metric not in m:
                sec = f"objective[{j}]" if j < len(self.spec.terms) else f"constraint[{j - len(self.spec.terms)}]"
                modes = sorted(k for k in m if k.startswith("mode_n_mean."))
                raise InputError(f"{sec}.metric", f"this run has no metric {t.metric!r}; its modes give {modes}", self.spec.source)


def _fail_row() -> dict:
    return {"objective": math.nan, "penalty": math.nan, "feasible": 0.0}


def for_optimizer(objective) -> float:
    """The value the optimiser sees: the stored objective, FAIL_VALUE where
    there is none (a failed run, a metric without a value; files written
    before NaN was stored hold FAIL_VALUE itself, which replays the same)."""
    if objective is None or not math.isfinite(objective):
        return FAIL_VALUE
    return float(objective)


def _drive(spec: OptimizeSpec, ev: _Evaluator) -> str:
    """Run the optimiser; returns its message."""
    from scipy.optimize import differential_evolution, minimize

    d = len(spec.params)
    x0 = np.array([p.start_u if p.start_u is not None else 0.5 for p in spec.params])
    try:
        if spec.method == "nelder-mead":
            simplex = [x0.copy()]
            for i in range(d):
                x = x0.copy()
                x[i] = x[i] + spec.initial_step if x[i] + spec.initial_step <= 1.0 else x[i] - spec.initial_step
                simplex.append(x)
            # the budget counts new evaluations only (repeated points are answered from the store): _Budget stops it
            res = minimize(lambda u: ev([u])[0], x0, method="Nelder-Mead", bounds=[(0.0, 1.0)] * d,
                           options={"maxfev": MAX_ASKS_PER_EVALUATION * spec.budget, "xatol": spec.xatol, "fatol": spec.fatol,
                                    "initial_simplex": np.array(simplex)})
        else:
            pop = max(5, spec.popsize * d)
            rng = np.random.default_rng(np.random.SeedSequence(spec.opt_seed))
            have_start = all(p.start_u is not None for p in spec.params)
            res = differential_evolution(_never, [(0.0, 1.0)] * d, popsize=spec.popsize, maxiter=max(0, spec.budget // pop - 1),
                                         tol=spec.tol, atol=spec.atol, polish=False, updating="deferred",
                                         workers=lambda _f, xs: ev(list(xs)), init="latinhypercube",
                                         x0=x0 if have_start else None, **rng_keyword(differential_evolution, rng))
        return str(res.message)
    except _Budget:
        return "evaluation budget used up"


def _never(u):  # pragma: no cover - differential evolution evaluates through its 'workers' map
    raise RuntimeError("evaluated outside the batch map")


def no_best_reason(spec: OptimizeSpec, entries: dict) -> str:
    """Why no evaluation can be the best: the first failure's message, or
    the metrics that had no value."""
    evals = [e for n, e in sorted(entries.items()) if n.startswith("points/")]
    failed = [e for e in evals if e.failed]
    if len(failed) == len(evals):
        first = f" (the first: {failed[0].error})" if failed else ""
        return f"every evaluation failed{first}; see the 'error' column of the output's summary table"
    watched = [t.metric for t in [*spec.terms, *spec.constraints]]
    empty = [m for m in dict.fromkeys(watched)
             if any(not e.failed and not math.isfinite(e.row.get(m, math.nan)) for e in evals)]
    n_ok = sorted({int(e.row["n_ok"]) for e in evals if not e.failed and math.isfinite(e.row.get("n_ok", math.nan))})
    why = f" (usable trajectories per run: {', '.join(map(str, n_ok))})" if n_ok else ""
    return (f"no evaluation gave an objective: {len(failed)} of {len(evals)} failed, and the others had no value of "
            f"{', '.join(empty) or 'the objective'}{why}; see the output's summary table")


def best_entry(entries: dict):
    """Name of the best evaluation: the lowest objective among feasible ones
    (if any; else among all), ties to the earliest."""
    evals = [(n, e) for n, e in sorted(entries.items()) if n.startswith("points/") and not e.failed
             and for_optimizer(e.row.get("objective")) < FAIL_VALUE]
    if not evals:
        return None
    feas = [(n, e) for n, e in evals if e.row.get("feasible", 0.0) == 1.0]
    pool = feas or evals
    return min(pool, key=lambda ne: (ne[1].row.get("objective", FAIL_VALUE), ne[0]))[0]


def run_optimize(spec, output, *, workers: int | None = None, scheduler: str | None = None, restart: bool = False,
                 progress: bool = False, executor=None, best_path=None, overrides=()) -> dict:
    """Run (or resume) an optimisation into ``output`` (HDF5) and write the
    best config as a runnable TOML (``best_path``, default ``<output
    stem>.best.toml``). Arguments as :func:`mdrotor.studies.sweep.run_sweep`.

    Returns
    -------
    dict: ``evaluations``, ``best`` (index, objective, parameter values,
    objective / constraint metrics), ``confirm`` (the re-run of the best
    point with fresh seeds and ``confirm.trajectories``), ``message``.
    """

    t0 = time.perf_counter()
    if not isinstance(spec, OptimizeSpec):
        spec = load_optimize(spec, overrides)
    output = Path(output)
    best_path = Path(best_path) if best_path else output.with_name(output.stem + ".best.toml")
    store = EntryStore(output, "optimize", spec.hash, restart)
    state = {"message": "", "finished": False, "best": None, "best_text": ""}
    meta = spec.meta()

    def full_meta():
        return {**meta, "finished": state["finished"], "message": state["message"],
                "best_index": -1 if state["best"] is None else int(state["best"].rsplit("/", 1)[1]),
                "best_config_text": state["best_text"]}

    def view(f):
        _optimize_view(f, spec, store)

    def make_ex():
        if executor is not None:
            return executor
        if spec.method == "nelder-mead":  # one evaluation at a time: all cores on it, in this process
            return make_executor(workers or 1, scheduler)
        return make_executor(workers, scheduler, max(5, spec.popsize * len(spec.params)))

    ev = None
    bar = None
    try:
        if progress:
            from tqdm import tqdm

            bar = tqdm(total=spec.budget, desc="mdrotor optimize", unit="eval", file=sys.stderr, dynamic_ncols=True)
        ev = _Evaluator(spec, store, make_ex, bar, view, full_meta)
        if not store.consolidated:
            ev.ex = make_ex()  # connect first: a wrong --scheduler leaves no file behind
            store.write_main(view, full_meta(), force=True)
        try:
            state["message"] = _drive(spec, ev)
            state["repeats"] = ev.repeats
            best = best_entry(store.entries)
            if best is None:
                raise InputError("", no_best_reason(spec, store.entries), spec.source)
            state["best"] = best
            vals = [p.value(u) for p, u in zip(spec.params, store.entries[best].attrs["u"])]
            ccfg = spec.config(vals, "best", trajectories=spec.confirm_trajectories, seed=spec.confirm_seed)
            state["best_text"] = ccfg.text
            if not store.has("confirm"):
                if ev.ex is None:
                    ev.ex = make_ex()
                for out in ev.ex.run([Task("confirm", ccfg)]):
                    row = {}
                    if not out.error:
                        m = point_metrics(out.result, ccfg)
                        val, pen, feas = spec.objective(m)
                        row = {**m, "objective": val, "penalty": pen, "feasible": float(feas)}
                    store.put("confirm", out.result, row, {"best": best, "values": [show(v) for v in vals]}, out.error)
            state["finished"] = True
            if not store.consolidated:
                store.write_main(view, full_meta(), consolidate=True)
        except BaseException:
            if ev.ex is not None and ev.ex is not executor:
                ev.ex.close(abort=True)
                ev.ex = None
            if not store.consolidated:
                store.write_main(view, full_meta(), force=True)
            raise
    finally:
        if bar is not None:
            bar.close()
        if ev is not None and ev.ex is not None and ev.ex is not executor:
            ev.ex.close()
        store.close()
    _write_text(best_path, state["best_text"])
    return _summary(spec, store, state, output, best_path, time.perf_counter() - t0)


def _write_text(path: Path, text: str) -> None:
    tmp = path.with_name(f".{path.name}.tmp{os.getpid()}")
    tmp.write_text(text)
    os.replace(tmp, path)


def _summary(spec, store, state, output, best_path, wall) -> dict:
    best = store.entries[state["best"]]
    conf = store.entries.get("confirm")
    watched = [t.metric for t in spec.terms] + [c.metric for c in spec.constraints]
    out = {"output": str(output), "best_toml": str(best_path), "method": spec.method, "message": state["message"],
           "evaluations": sum(1 for n in store.entries if n.startswith("points/")),
           "repeated_points": int(state.get("repeats", 0)),
           "best": {"index": int(best.attrs["index"]), "objective": best.row.get("objective"),
                    "feasible": best.row.get("feasible") == 1.0,
                    "parameters": dict(zip(spec.keys, best.attrs["values"])),
                    "metrics": {m: best.row.get(m) for m in watched}},
           "wall_s": wall}
    if conf is not None:
        out["confirm"] = {"trajectories": spec.confirm_trajectories, "seed": spec.confirm_seed, "error": conf.error,
                          "objective": conf.row.get("objective"), "feasible": conf.row.get("feasible") == 1.0,
                          "metrics": {m: conf.row.get(m) for m in watched},
                          "errors": {m: conf.row[err_name(m, conf.row)] for m in watched if err_name(m, conf.row)},
                          "intervals": {m: [conf.row[m + "_lo"], conf.row[m + "_hi"]] for m in watched
                                        if m + "_lo" in conf.row and m + "_hi" in conf.row}}
    return out


def _optimize_view(f, spec: OptimizeSpec, store) -> None:
    names = sorted(n for n in store.entries if n.startswith("points/"))
    n = len(names)
    ents = [store.entries[nm] for nm in names]
    ax = f.create_group("axes")
    for j, p in enumerate(spec.params):
        g = write_axis(ax, j, p.key, [e.attrs["values"][j] for e in ents], p.log)
        g.attrs["bounds"] = [show(with_unit(p.lo, p.unit)), show(with_unit(p.hi, p.unit))]
    u = np.array([e.attrs["u"] for e in ents], dtype=float).reshape(n, len(spec.params))
    f.create_dataset("history/u", data=u)
    write_summary(f, n, names, store.entries, np.full(n, spec.seed, dtype=np.uint64))






def optimize_text(s: dict) -> str:
    b = s["best"]
    rep = f", {s['repeated_points']} repeated points answered from earlier ones" if s.get("repeated_points") else ""
    lines = [f"optimize ({s['method']}): {s['evaluations']} evaluations{rep} -> {s['output']}  [{plain(s['wall_s'], 3)} s]; {s['message']}",
             f"best: evaluation {b['index']}, objective {plain(b['objective'])}{'' if b['feasible'] else ' (violates a constraint)'}"]
    for k, v in b["parameters"].items():
        lines.append(f"  {k} = {v}")
    for k, v in b["metrics"].items():
        lines.append(f"  {k:<28s} {plain(v)}")
    c = s.get("confirm")
    if c:
        if c["error"]:
            lines.append(f"confirmation run failed: {c['error']}")
        else:
            lines.append(f"confirmation ({c['trajectories']} trajectories, fresh seed {c['seed']}): objective {plain(c['objective'])}"
                         f"{'' if c['feasible'] else ' (violates a constraint)'}")
            for k, v in c["metrics"].items():
                if k in c.get("intervals", {}):
                    txt = interval(v, *c["intervals"][k]) + " (Wilson 68 %)"
                elif k in c["errors"]:
                    txt = value_err(v, c["errors"][k])
                else:
                    txt = plain(v)
                lines.append(f"  {k:<28s} {txt}")
    lines.append(f"best config: {s['best_toml']}  (mdrotor run {s['best_toml']})")
    return "\n".join(lines)



