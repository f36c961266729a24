"""Record what every ``mdrotor`` command prints and writes, and compare two records.

Used to show that a change meant to move code without changing behaviour
(e.g. a package restructure) really changes nothing a user can see:

    python scripts/record_outputs.py record OUTDIR [--quick]
    python scripts/record_outputs.py compare DIR_A DIR_B

``record`` copies ``configs/`` into OUTDIR and runs every invocation of
``INVOCATIONS`` below as a subprocess (``python -m mdrotor ...``, with the
Python running this script, so the installed ``mdrotor`` of that
environment is recorded) from inside OUTDIR, so every path a command sees
or prints is relative and the same in any two records. For each
invocation it keeps the exit status, stdout and stderr; every file the
commands write lands in OUTDIR/out. Each HDF5 file is then walked and every
dataset (dtype, shape, SHA-256 of its bytes) and attribute (its value) is
written to ``<file>.dump.json``. Work is kept small only through the
command line (fewer trajectories, one worker, one thread), the same in
every record; a full record takes about 20 minutes on two busy cores (174
invocations). ``--quick`` leaves out the costly invocations (both records
compared must use the same choice).

``compare`` reports every difference between two records (invocation, exit
status, first differing line of stdout/stderr, differing dataset or
attribute, differing file) after masking what legitimately changes from one
recording to the next (``TEXT_MASKS``, ``IGNORED_KEYS``). Exit status 0
when identical, 1 otherwise.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent

# Every run uses the config's own seed (fixed in the file) or the one given
# here, one thread and one worker, so floating results are bit-identical.
T = "8"        # trajectories of a run / compare-trap / quantum ensemble
THREADS = ["--threads", "1"]
ONE_THREAD = ["--set", "run.threads=1"]   # sweeps and optimisations: the base config's threads
WORKERS = ["--workers", "1"]

RUN_CONFIGS = ["demo", "laser_spinup", "layout_string2", "linear_three", "noisy_release",
               "quantum_pair", "square_order4", "triangle_order3", "two_ion_quadrupole",
               "electrodes/ring12_square4_run", "electrodes/ring6_string2_run",
               "electrodes/ring8_triangle3_run"]
LAYOUTS = ["ring12_square4", "ring6_string2", "ring8_triangle3"]
SWEEPS = ["forced_oscillator", "pinning_sobol", "rotation_zip", "spinup_grid"]
OPTIMIZES = ["optimize_duration", "optimize_ramp"]
COMMANDS = ["crystal", "run", "rotor", "compare-trap", "quantum", "sweep", "optimize",
            "electrodes", "report"]


def _flat(name: str) -> str:
    return name.replace("/", "_")


def invocations(quick: bool) -> list[tuple[str, list[str]]]:
    """(name, mdrotor arguments) in the order they are run; names are unique
    and become file names. Later invocations read files earlier ones wrote."""
    inv: list[tuple[str, list[str]]] = []
    add = lambda name, *args: inv.append((name, [str(a) for a in args]))  # noqa: E731

    add("version", "--version")
    add("help", "--help")
    for c in COMMANDS:
        add(f"help_{c}", c, "--help")

    # crystal: every run config, text and JSON; one explicit rotation rate
    for c in RUN_CONFIGS:
        add(f"crystal_{_flat(c)}", "crystal", f"configs/{c}.toml")
        add(f"crystal_{_flat(c)}_json", "crystal", f"configs/{c}.toml", "--json")
    add("crystal_demo_frot", "crystal", "configs/demo.toml", "--f-rot", "150 kHz")

    # run: every run config (text), and JSON with a second output file
    for c in RUN_CONFIGS:
        add(f"run_{_flat(c)}", "run", f"configs/{c}.toml", "--trajectories", T, *THREADS, "--quiet",
            "-o", f"out/run_{_flat(c)}.h5")
        if not quick or c == "demo":
            add(f"run_{_flat(c)}_json", "run", f"configs/{c}.toml", "--trajectories", T, *THREADS,
                "--quiet", "--json", "-o", f"out/run_{_flat(c)}_json.h5")
    add("run_demo_seed", "run", "configs/demo.toml", "--trajectories", "4", "--seed", "99", *THREADS,
        "--quiet", "-o", "out/run_demo_seed99.h5")
    add("run_demo_exists", "run", "configs/demo.toml", "--trajectories", "4", *THREADS, "--quiet",
        "-o", "out/run_demo.h5")  # output exists: refused or overwritten, as the code does it

    # rotor: on every run result and on every config, text and JSON
    for c in RUN_CONFIGS:
        add(f"rotor_h5_{_flat(c)}", "rotor", f"out/run_{_flat(c)}.h5")
        add(f"rotor_h5_{_flat(c)}_json", "rotor", f"out/run_{_flat(c)}.h5", "--json")
        add(f"rotor_toml_{_flat(c)}", "rotor", f"configs/{c}.toml")
        add(f"rotor_toml_{_flat(c)}_json", "rotor", f"configs/{c}.toml", "--json")
    add("rotor_demo_options", "rotor", "out/run_demo.h5", "--k", "2", "--diffusion", "1e3",
        "--contrast", "0.3")

    # compare-trap: the full RF force is costly (small steps); few trajectories
    ct = RUN_CONFIGS if not quick else ["demo"]
    for c in ct:
        add(f"comparetrap_{_flat(c)}", "compare-trap", f"configs/{c}.toml", "--trajectories", "2",
            *THREADS, "--quiet")
    add("comparetrap_demo_json", "compare-trap", "configs/demo.toml", "--trajectories", "2", *THREADS,
        "--quiet", "--json")

    # quantum: on configs/quantum_pair.toml only, the config written for it; on the other
    # configs (L ~ 1e4 hbar at 0.5 mK) the propagation alone takes over ten minutes
    add("quantum_pair", "quantum", "configs/quantum_pair.toml", "--no-ensemble", "--quiet")
    add("quantum_pair_json", "quantum", "configs/quantum_pair.toml", "--no-ensemble", "--quiet", "--json")
    if not quick:
        add("quantum_pair_ensemble", "quantum", "configs/quantum_pair.toml", "--trajectories", T,
            "--quiet", "--json", "-o", "out/quantum_pair.h5", *ONE_THREAD)
        add("quantum_h5_pair", "quantum", "out/run_quantum_pair.h5", "--quiet", "-o", "out/quantum_from_run.h5")

    # sweep: every sweep file, one worker, 2 trajectories a point (the grids are not
    # reducible from the command line: --set acts on the base config)
    sw = SWEEPS if not quick else ["forced_oscillator", "rotation_zip"]
    for s in sw:
        add(f"sweep_{s}", "sweep", f"configs/sweeps/{s}.toml", *WORKERS, "--trajectories", "2", "--quiet",
            *ONE_THREAD, "-o", f"out/sweep_{s}.h5", "--csv", f"out/sweep_{s}.csv")
    add("sweep_rotation_zip_json", "sweep", "configs/sweeps/rotation_zip.toml", *WORKERS, "--trajectories",
        "2", "--quiet", "--json", *ONE_THREAD, "-o", "out/sweep_rotation_zip_json.h5")
    add("sweep_rotation_zip_resume", "sweep", "configs/sweeps/rotation_zip.toml", *WORKERS,
        "--trajectories", "2", "--quiet", *ONE_THREAD, "-o", "out/sweep_rotation_zip.h5")

    # optimize: one worker; the budgets are the files' own, so optimize_ramp.toml (120
    # evaluations of 100 trajectories) is left out: minutes on a quiet machine
    op = ["optimize_duration"]
    for o in op:
        add(f"optimize_{o}", "optimize", f"configs/sweeps/{o}.toml", *WORKERS, "--quiet", *ONE_THREAD,
            "-o", f"out/{o}.h5", "--best", f"out/{o}.best.toml", "--csv", f"out/{o}.csv")
    add("optimize_duration_json", "optimize", "configs/sweeps/optimize_duration.toml", *WORKERS, "--quiet",
        "--json", *ONE_THREAD, "-o", "out/optimize_duration_json.h5")

    # electrodes: every layout alone and with its run config, text and JSON; waveforms
    for lay in LAYOUTS:
        f = f"configs/electrodes/{lay}.toml"
        add(f"electrodes_{lay}", "electrodes", f)
        add(f"electrodes_{lay}_json", "electrodes", f, "--json")
        add(f"electrodes_{lay}_run", "electrodes", f, "--config", f"configs/electrodes/{lay}_run.toml")
        add(f"electrodes_{lay}_run_json", "electrodes", f, "--config", f"configs/electrodes/{lay}_run.toml",
            "--json")
    add("electrodes_waveform_csv", "electrodes", "configs/electrodes/ring6_string2.toml", "--config",
        "configs/electrodes/ring6_string2_run.toml", "--waveform", "out/waveform_ring6.csv", "--rate", "5 MHz")
    add("electrodes_waveform_h5", "electrodes", "configs/electrodes/ring6_string2.toml", "--config",
        "configs/electrodes/ring6_string2_run.toml", "--waveform", "out/waveform_ring6.h5")

    # report: every kind of file (run, sweep, optimisation), text and JSON
    reps = [f"run_{_flat(c)}" for c in (RUN_CONFIGS if not quick else ["demo", "noisy_release",
                                                                        "laser_spinup"])]
    reps += [f"sweep_{s}" for s in sw] + list(op)
    for r in reps:
        add(f"report_{r}", "report", f"out/{r}.h5", "-o", f"out/report_{r}")
    add("report_demo_json", "report", "out/run_demo.h5", "-o", "out/report_demo_json", "--json")
    add("report_spinup_slice", "report", "out/sweep_rotation_zip.h5", "-o", "out/report_zip_html",
        "--summary", "html", "--dpi", "60")

    # bad input: one line, exit status 2
    add("bad_missing_file", "run", "configs/no_such_file.toml")
    add("bad_set_value", "crystal", "configs/demo.toml", "--set", "trap.f_radial=fast")
    add("bad_set_key", "crystal", "configs/demo.toml", "--set", "trap.no_such_key=1")
    add("bad_h5", "rotor", "configs/sweeps/../demo.toml.h5")
    add("bad_layout", "electrodes", "configs/demo.toml")
    return inv


# ---------------------------------------------------------------------------
# canonical form of an HDF5 file

def _attr_value(v):
    import numpy as np

    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    if isinstance(v, np.ndarray):
        return [_attr_value(x) for x in v.tolist()] if v.dtype.kind in "OSU" else \
            {"dtype": str(v.dtype), "shape": list(v.shape), "sha256": hashlib.sha256(
                np.ascontiguousarray(v).tobytes()).hexdigest()}
    if isinstance(v, np.generic):
        return _attr_value(v.item())
    if isinstance(v, float):
        return v.hex()                      # exact
    return v


def dump_hdf5(path: Path) -> dict:
    """Every group, dataset (dtype, shape, SHA-256 of the bytes) and attribute of a file."""
    import h5py
    import numpy as np

    out: dict = {}

    def attrs(obj):
        return {k: _attr_value(obj.attrs[k]) for k in sorted(obj.attrs.keys())}

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset):
            data = obj[()]
            if isinstance(data, np.ndarray) and data.dtype.kind not in "OSU" and data.dtype.names is None:
                raw = np.ascontiguousarray(data).tobytes()
            else:
                raw = repr(data.tolist() if isinstance(data, np.ndarray) else data).encode()
            out[name] = {"kind": "dataset", "dtype": str(obj.dtype), "shape": list(obj.shape),
                         "sha256": hashlib.sha256(raw).hexdigest(), "attrs": attrs(obj)}
            if obj.size <= 16 and isinstance(data, np.ndarray) and data.dtype.kind in "fiub":
                out[name]["values"] = [_attr_value(x) for x in data.ravel().tolist()]
        else:
            out[name] = {"kind": "group", "attrs": attrs(obj)}

    with h5py.File(path, "r") as f:
        out["/"] = {"kind": "group", "attrs": attrs(f)}
        f.visititems(visit)
    return out


# ---------------------------------------------------------------------------
def record(outdir: Path, quick: bool) -> int:
    outdir = outdir.resolve()
    if outdir.exists() and any(outdir.iterdir()):
        print(f"record_outputs: {outdir} is not empty", file=sys.stderr)
        return 2
    (outdir / "out").mkdir(parents=True)
    (outdir / "cmd").mkdir()
    shutil.copytree(REPO / "configs", outdir / "configs")
    env = dict(os.environ, NUMBA_NUM_THREADS="1", OMP_NUM_THREADS="1", MPLBACKEND="Agg",
               PYTHONHASHSEED="0", TZ="UTC", COLUMNS="100")
    env.pop("PYTHONPATH", None)
    import mdrotor  # noqa: F401  (where the recorded code lives; not compared)

    meta = {"python": sys.executable, "mdrotor": str(Path(mdrotor.__file__).parent),
            "quick": quick, "started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
    inv = invocations(quick)
    t_all = time.time()
    for i, (name, args) in enumerate(inv):
        t0 = time.time()
        p = subprocess.run([sys.executable, "-m", "mdrotor", *args], cwd=outdir, env=env,
                           capture_output=True, text=True)
        dt = time.time() - t0
        (outdir / "cmd" / f"{name}.json").write_text(json.dumps(
            {"args": args, "returncode": p.returncode}, indent=1) + "\n")
        (outdir / "cmd" / f"{name}.stdout").write_text(p.stdout)
        (outdir / "cmd" / f"{name}.stderr").write_text(p.stderr)
        meta.setdefault("seconds", {})[name] = round(dt, 2)
        print(f"[{i + 1}/{len(inv)}] {dt:7.1f} s  exit {p.returncode}  {name}", flush=True)
    for h5 in sorted((outdir / "out").rglob("*.h5")):
        (h5.parent / (h5.name + ".dump.json")).write_text(json.dumps(dump_hdf5(h5), indent=1) + "\n")
    meta["total_seconds"] = round(time.time() - t_all, 1)
    (outdir / "meta.json").write_text(json.dumps(meta, indent=1) + "\n")
    print(f"recorded {len(inv)} invocations in {meta['total_seconds']} s into {outdir}")
    return 0


# ---------------------------------------------------------------------------
# What may differ between two recordings of unchanged behaviour.
TEXT_MASKS = [
    (re.compile(r"mdrotor \d+\.\d+[\w.+-]*"), "mdrotor <version>"),      # the version string
    (re.compile(r'"(mdrotor_)?version": "[^"]*"'), '"version": "<version>"'),
    (re.compile(r"\d{4}-\d\d-\d\d[T ]\d\d:\d\d(:\d\d(\.\d+)?)?(Z|[+-]\d\d:?\d\d)?"), "<date>"),  # timestamps
    # wall and compile times, rates: depend on the machine's load
    (re.compile(r"\bwall [-+0-9.eE]+ s\b"), "wall <time>"),
    (re.compile(r"\(\+ [-+0-9.eE]+ s kernel compilation"), "(+ <time> kernel compilation"),
    (re.compile(r"[-+0-9.eE]+ s CPU \([-+0-9.eE]+ s wall\)"), "<time> CPU (<time> wall)"),  # quantum numerics
    (re.compile(r"(-> \S+  )\[[-+0-9.eE]+ s\]"), r"\1[<time>]"),     # sweep / optimize summary line (optimize goes on)
    (re.compile(r"\| (wall_s|total_wall_s|compile_s|cpu_s|traj_steps_per_s) \|[^|\n]*\|"),
     r"| \1 | <time> |"),                                                   # report summary tables
    (re.compile(r"[-+0-9.eE]+\s*(k|M|G)?\s*(trajectory-steps|traj(ectory)?[- ]steps|steps)/s"), "<rate>"),
    (re.compile(r"(?i)\b\d+ threads?\b"), "<threads>"),                  # host/thread info
    (re.compile(r"(?i)(host|hostname)\W{1,3}[\w.-]+"), r"\1 <host>"),
    (re.compile(r"/tmp/[\w./-]+"), "<tmp>"),                              # temp paths
]
# Names (attribute, JSON key, dataset) whose values are ignored, listed one by one
# (a pattern like "*_s" would hide physics: t_s, dt_s, coherence_time_s).
IGNORED_KEYS = re.compile("(" + "|".join([
    "mdrotor_version", "package_version", "version",  # the version string
    "created", "date", "timestamp",          # when the file was written
    "wall_s", "total_wall_s", "compile_s", "cpu_s",  # wall, CPU and compile times: the machine's load
    "traj_steps_per_s",                      # a rate: wall time again
    "threads", "host", "hostname",           # where and how it ran
    "config_dir",                            # the config's absolute folder: inside each record's own folder
]) + ")$")


def mask_text(s: str, outdir: Path) -> str:
    s = s.replace(str(outdir), "<OUTDIR>")
    for rx, rep in TEXT_MASKS:
        s = rx.sub(rep, s)
    return s


def _first_diff(a: str, b: str) -> str:
    la, lb = a.splitlines(), b.splitlines()
    for i, (x, y) in enumerate(zip(la, lb)):
        if x != y:
            return f"line {i + 1}:\n    A: {x[:300]}\n    B: {y[:300]}"
    return f"line {min(len(la), len(lb)) + 1}: one has {len(la)} lines, the other {len(lb)}"


def _mask_dump(d: dict) -> dict:
    out = {}
    for name, entry in d.items():
        base = name.rsplit("/", 1)[-1]
        e = dict(entry)
        if IGNORED_KEYS.match(base) and e.get("kind") == "dataset":
            e = {"kind": "dataset", "ignored": True}
        e["attrs"] = {k: ("<ignored>" if IGNORED_KEYS.match(k) else v) for k, v in entry.get("attrs", {}).items()}
        out[name] = e
    return out


def compare(a: Path, b: Path) -> int:
    a, b = a.resolve(), b.resolve()
    diffs: list[str] = []
    skip = {"meta.json"}
    files_a = {p.relative_to(a) for p in a.rglob("*") if p.is_file()}
    files_b = {p.relative_to(b) for p in b.rglob("*") if p.is_file()}
    for rel in sorted(files_a ^ files_b):
        diffs.append(f"{rel}: only in {'A' if rel in files_a else 'B'}")
    for rel in sorted(files_a & files_b):
        if str(rel) in skip:
            continue
        pa, pb = a / rel, b / rel
        if rel.suffix == ".h5":
            continue                               # compared through its .dump.json
        if rel.name.endswith(".h5.dump.json"):
            da, db = _mask_dump(json.loads(pa.read_text())), _mask_dump(json.loads(pb.read_text()))
            for name in sorted(set(da) | set(db)):
                if name not in da or name not in db:
                    diffs.append(f"{rel}: {name} only in {'A' if name in da else 'B'}")
                elif da[name] != db[name]:
                    ea, eb = da[name], db[name]
                    what = [k for k in sorted(set(ea) | set(eb)) if ea.get(k) != eb.get(k)]
                    if "attrs" in what:
                        ks = [k for k in sorted(set(ea["attrs"]) | set(eb["attrs"]))
                              if ea["attrs"].get(k) != eb["attrs"].get(k)]
                        what = [w for w in what if w != "attrs"] + [f"attr {k}: {str(ea['attrs'].get(k))[:120]} "
                                                                    f"vs {str(eb['attrs'].get(k))[:120]}" for k in ks]
                    diffs.append(f"{rel}: {name}: differs in {', '.join(what)}")
            continue
        ba, bb = pa.read_bytes(), pb.read_bytes()
        try:
            ta, tb = ba.decode(), bb.decode()
        except UnicodeDecodeError:
            if ba != bb:
                diffs.append(f"{rel}: binary content differs")
            continue
        ta, tb = mask_text(ta, a), mask_text(tb, b)
        if rel.suffix == ".json" and not rel.parts[0] == "configs":
            try:
                ja, jb = json.loads(ta), json.loads(tb)
                ta, tb = (json.dumps(_mask_json(j), indent=1, sort_keys=True) for j in (ja, jb))
            except ValueError:
                pass
        elif rel.suffix == ".csv":
            ta, tb = (_mask_csv(t) for t in (ta, tb))
        elif rel.suffix == ".stdout":
            ta, tb = (_mask_json_lines(t) for t in (ta, tb))
        if ta != tb:
            cmd = ""
            if rel.parts[0] == "cmd" and (a / "cmd" / (rel.stem + ".json")).exists():
                cmd = " (mdrotor " + " ".join(json.loads((a / "cmd" / (rel.stem + ".json")).read_text())["args"]) + ")"
            diffs.append(f"{rel}{cmd}: {_first_diff(ta, tb)}")
    for d in diffs:
        print(d)
    n_cmd = len([p for p in files_a if p.parts[0] == "cmd" and p.suffix == ".json"])
    print(f"compared {len(files_a & files_b)} files ({n_cmd} invocations): "
          f"{'identical' if not diffs else f'{len(diffs)} differences'}")
    return 0 if not diffs else 1


def _mask_json(j):
    if isinstance(j, dict):
        return {k: ("<ignored>" if IGNORED_KEYS.match(k) else _mask_json(v)) for k, v in j.items()}
    if isinstance(j, list):
        return [_mask_json(v) for v in j]
    return j


def _mask_csv(t: str) -> str:
    """A CSV table: the columns named in IGNORED_KEYS emptied."""
    import csv
    import io

    rows = list(csv.reader(io.StringIO(t)))
    if not rows:
        return t
    drop = [i for i, name in enumerate(rows[0]) if IGNORED_KEYS.match(name)]
    for r in rows[1:]:
        for i in drop:
            if i < len(r):
                r[i] = "<ignored>"
    return "\n".join(",".join(r) for r in rows)


def _mask_json_lines(t: str) -> str:
    """A stdout that is one JSON object (``--json``): mask by key, pretty-print."""
    try:
        j = json.loads(t)
    except ValueError:
        return t
    return json.dumps(_mask_json(j), indent=1, sort_keys=True)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    sub = ap.add_subparsers(dest="cmd", required=True)
    r = sub.add_parser("record", help="run every invocation and keep its output")
    r.add_argument("outdir", type=Path)
    r.add_argument("--quick", action="store_true", help="leave out the costly invocations")
    c = sub.add_parser("compare", help="compare two records")
    c.add_argument("dir_a", type=Path)
    c.add_argument("dir_b", type=Path)
    args = ap.parse_args(argv)
    if args.cmd == "record":
        return record(args.outdir, args.quick)
    return compare(args.dir_a, args.dir_b)


if __name__ == "__main__":
    sys.exit(main())
