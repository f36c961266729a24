"""The one-page report: ``mdrotor report FILE.h5`` writes the figures of a run,
sweep, optimisation or quantum-rotor file and a summary page (Markdown or
HTML) into a folder (:func:`write_report`)::

    from mdrotor.report.page import write_report
    out = write_report("demo.h5", "demo_report", fmt="png", summary="html")

The page holds the key numbers, the figures with their captions, the
skipped figures and why, the provenance and the config.
"""

from __future__ import annotations

import html
import os
from pathlib import Path

import numpy as np

from mdrotor.analysis.summary import summary_text
from mdrotor.errors import InputError
from mdrotor.numfmt import compact, plus_minus
from mdrotor.report.inputs import MissingData, file_kind, plotting
from mdrotor.report.labels import fraction_text, frame_text, key_label, metric_name, plain_text
from mdrotor.report.quantum_figure import QUANTUM_CAPTION, quantum_dict, quantum_figure
from mdrotor.report.run_figures import CAPTIONS, draw_run_figures, frame_of, load_run
from mdrotor.report.study_figures import confirm_error, optimize_figure, sweep_figures, sweep_meta
from mdrotor.studies.quantum import text
from mdrotor.studies.table import read_point, read_table

__all__ = ["FORMATS", "SUMMARY_FORMATS", "write_report"]

FORMATS = ("png", "pdf", "svg")
SUMMARY_FORMATS = ("md", "html")


class _Doc:
    """A tiny document model rendered as Markdown or HTML."""

    def __init__(self):
        self.blocks = []

    def h(self, level, text):
        self.blocks.append(("h", level, text))

    def p(self, text):
        self.blocks.append(("p", text))

    def table(self, header, rows):
        self.blocks.append(("table", header, rows))

    def pre(self, text):
        self.blocks.append(("pre", text))

    def items(self, items):
        self.blocks.append(("ul", items))

    def img(self, rel, caption):
        self.blocks.append(("img", rel, caption))

    def markdown(self) -> str:
        out = []
        for b in self.blocks:
            if b[0] == "h":
                out.append("#" * b[1] + " " + b[2])
            elif b[0] == "p":
                out.append(b[1])
            elif b[0] == "table":
                out.append("| " + " | ".join(b[1]) + " |")
                out.append("|" + "---|" * len(b[1]))
                out += ["| " + " | ".join(str(c).replace("|", "\\|") for c in r) + " |" for r in b[2]]
            elif b[0] == "pre":
                out.append("```\n" + b[1].rstrip() + "\n```")
            elif b[0] == "ul":
                out += [f"- {x}" for x in b[1]]
            elif b[0] == "img":
                out.append(f"![{b[2]}]({b[1]})\n\n*{b[2]}*")
            out.append("")
        return "\n".join(out)

    def html(self, title) -> str:
        e = html.escape
        out = ["<!DOCTYPE html>", "<html><head><meta charset='utf-8'>", f"<title>{e(title)}</title>",
               "<style>body{font-family:'DejaVu Sans',sans-serif;max-width:17cm;margin:1.5em auto;font-size:10pt;color:#1c1c1c}"
               "table{border-collapse:collapse;font-size:9pt}td,th{border-bottom:1px solid #ccc;padding:2px 8px;text-align:left}"
               "pre{background:#f4f4f4;padding:6px;font-size:8pt;overflow-x:auto}img{max-width:100%}"
               "figcaption{font-size:8.5pt;color:#444}figure{margin:1em 0}</style></head><body>"]
        for b in self.blocks:
            if b[0] == "h":
                out.append(f"<h{b[1]}>{e(b[2])}</h{b[1]}>")
            elif b[0] == "p":
                out.append(f"<p>{e(b[1])}</p>")
            elif b[0] == "table":
                out.append("<table><tr>" + "".join(f"<th>{e(str(c))}</th>" for c in b[1]) + "</tr>")
                out += ["<tr>" + "".join(f"<td>{e(str(c))}</td>" for c in r) + "</tr>" for r in b[2]]
                out.append("</table>")
            elif b[0] == "pre":
                out.append(f"<pre>{e(b[1])}</pre>")
            elif b[0] == "ul":
                out.append("<ul>" + "".join(f"<li>{e(x)}</li>" for x in b[1]) + "</ul>")
            elif b[0] == "img":
                out.append(f"<figure><img src='{e(b[1])}' alt='{e(b[2])}'><figcaption>{e(b[2])}</figcaption></figure>")
        out.append("</body></html>")
        return "\n".join(out)


def _save(fig, folder: Path, name: str, fmt: str, dpi: int) -> Path:
    p = folder / f"{name}.{fmt}"
    with plotting().context():  # the style's savefig settings (tight box, fonts kept as text)
        fig.savefig(p, format=fmt, dpi=dpi)
    return p


def _provenance_rows(attrs: dict, keys) -> list:
    rows = []
    for k in keys:
        if k in attrs:
            v = attrs[k]
            if isinstance(v, bytes):
                v = v.decode()
            if isinstance(v, float):
                v = f"{v:.6g}"
            rows.append([k, str(v)])
    return rows


def write_report(source, output_dir=None, fmt: str = "png", *, summary: str = "md", diffusion_hbar2_per_s=None,
                 k: int | None = None, metrics=None, axes=None, fixed=None, dpi: int = 150) -> dict:
    """Write the figures and a one-page summary of a run, sweep or optimisation file.

    Parameters
    ----------
    source : path
        A result, sweep or optimisation file (``.h5``).
    output_dir : path, optional
        Folder for the figures and ``summary.md`` / ``summary.html``
        (default ``<file stem>_report`` in the current folder; created).
    fmt : {"png", "pdf", "svg"}
    summary : {"md", "html"}
    diffusion_hbar2_per_s, k
        For the coherence figure, see :func:`~mdrotor.report.run_figures.coherence_figure`.
    metrics, axes, fixed
        For sweeps, see :func:`~mdrotor.report.study_figures.sweep_figures`.
    dpi : int
        Resolution of PNG figures.

    Returns
    -------
    dict
        ``kind``, ``output_dir``, ``figures`` (list of paths), ``skipped``
        ({name: reason}), ``summary`` (path).
    """
    if fmt not in FORMATS:
        raise InputError("--format", f"expected one of {', '.join(FORMATS)}, got {fmt!r}", "command line")
    if summary not in SUMMARY_FORMATS:
        raise InputError("--summary", f"expected one of {', '.join(SUMMARY_FORMATS)}, got {summary!r}", "command line")
    plotting()
    src = Path(source)
    kind = file_kind(src)
    out = Path(output_dir) if output_dir is not None else Path(f"{src.stem}_report")
    if out.exists() and not out.is_dir():
        raise InputError("-o", f"{str(out)!r} exists and is not a folder", "command line")
    if not out.parent.exists():
        raise InputError("-o", f"the folder {str(out.parent)!r} does not exist", "command line")
    try:
        out.mkdir(exist_ok=True)
        probe = out / f".write-test-{os.getpid()}"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as e:
        raise InputError("-o", f"cannot write the report into {str(out)!r} ({e.strerror}); expected a writable folder",
                         "command line") from None
    doc = _Doc()
    written, skipped = [], {}
    if kind == "run":
        _report_run(src, out, fmt, dpi, doc, written, skipped, diffusion_hbar2_per_s, k)
    elif kind == "quantum":
        _report_quantum(src, out, fmt, dpi, doc, written, skipped)
    else:
        _report_sweep(src, kind, out, fmt, dpi, doc, written, skipped, metrics, axes, fixed, diffusion_hbar2_per_s, k)
    title = f"mdrotor report: {src.name}"
    spath = out / f"summary.{summary}"
    spath.write_text(doc.markdown() if summary == "md" else doc.html(title), encoding="utf-8")
    return {"kind": kind, "output_dir": str(out), "figures": [str(p) for p in written], "skipped": skipped,
            "summary": str(spath)}


def _emit(figs: dict, out, fmt, dpi, doc, written, prefix="", captions=None):
    for name, fig in figs.items():
        p = _save(fig, out, prefix + name, fmt, dpi)
        written.append(p)
        doc.img(p.name, (captions or CAPTIONS).get(name, name))
        fig.clear()  # figures were never registered with pyplot: clearing frees them


def _report_run(src, out, fmt, dpi, doc, written, skipped, diffusion, k, prefix="", res=None, title=True):
    path = None
    if res is None:
        res, path = load_run(src)
    figs, skip, rot = draw_run_figures(res, path, diffusion, k)
    if title:
        doc.h(1, f"mdrotor report: {Path(src).name}")
    a = res.attrs
    s = res.summary
    doc.h(2, "Key numbers" if not prefix else "Confirmation run: key numbers")
    def k(x, scale=1.0):  # a statistic that could not be computed is absent (mdrotor.results.stats)
        v = s.get(x)
        return None if v is None else v * scale

    rows = [["final L (mean)", f"{plus_minus(k('L_mean_hbar'), k('L_mean_err_hbar'), 6)} ħ"],
            ["final L spread", f"{plus_minus(k('L_std_hbar'), k('L_std_err_hbar'))} ħ"],
            ["rotation f_rot", f"{plus_minus(k('f_rot_mean_hz', 1e-3), k('f_rot_mean_err_hz', 1e-3), 7)} kHz"],
            ["slipped / lost / reordered", " / ".join(fraction_text(s, m) for m in
                                                      ("slip_fraction", "loss_fraction", "reorder_fraction"))],
            ["differential phonons", plus_minus(k("differential_n_mean"), k("differential_n_err"))],
            ["COM phonons", plus_minus(k("com_n_mean"), k("com_n_err"))],
            ["trajectories used (finite, bound)", f"{s.get('n_ok', '?')} of {s.get('n_trajectories', '?')}"],
            ["modes measured in the", frame_text(frame_of(res, res.final))]]
    if rot:
        rows += [["allowed L", f"{rot['allowed_L_residue']} mod {rot['allowed_L_mod']} ({rot['statistics']})"],
                 ["ħ/(2πI)", f"{rot['hbar_over_I_hz']:.5g} Hz"],
                 [f"exchange / revival (k = {rot['k']})",
                  f"{rot['exchange_time_s'] * 1e3:.5g} ms / {rot['revival_time_s'] * 1e3:.5g} ms"],
                 ["lines ΔL = " + ", ".join(str(ln["dL"]) for ln in rot["lines"]),
                  "; ".join(f"{ln['freq_hz'] / 1e3:.7g} ± {ln['width_hz'] / 1e3:.3g} kHz" for ln in rot["lines"])],
                 ["diffusion D", f"{rot['diffusion_hbar2_per_s']:.4g} ħ²/s ({rot['diffusion_source']})"
                  if rot["diffusion_hbar2_per_s"] > 0 else "none (no noise in the run; --diffusion D sets one)"]]
        if rot["diffusion_hbar2_per_s"] > 0:
            rows.append(["coherence time (1/e) Ramsey / echo",
                         f"{rot['coherence_time_s'] * 1e3:.4g} ms / {rot['echo_coherence_time_s'] * 1e3:.4g} ms"])
    doc.table(["quantity", "value"], rows)
    doc.pre(summary_text(res))
    doc.h(2, "Figures")
    _emit(figs, out, fmt, dpi, doc, written, prefix)
    if skip:
        doc.h(3, "Skipped figures")
        doc.items([f"{n}: {r}" for n, r in skip.items()])
    for n, r in skip.items():
        skipped[prefix + n] = r
    doc.h(2, "Provenance")
    doc.table(["attribute", "value"], _provenance_rows(a, ("package_version", "format_version", "created", "seed", "dt_s",
                                                            "n_steps", "n_trajectories", "integrator", "threads", "wall_s",
                                                            "config_source")))
    doc.h(2, "Config (overrides applied)")
    doc.pre(str(a.get("config_text", "")))


def _report_sweep(src, kind, out, fmt, dpi, doc, written, skipped, metrics, axes, fixed, diffusion, k):
    t = read_table(src)
    meta = sweep_meta(src)
    meta["path"] = str(src)
    done = np.asarray(t["complete"], bool) & ~np.asarray(t["failed"], bool)
    doc.h(1, f"mdrotor report: {src.name} ({'optimisation' if kind == 'optimize' else 'sweep'})")
    rows = [["points", f"{int(done.sum())} finished, {int(np.sum(t['failed']))} failed, {len(done)} in all"]]
    for key, ax in t["axes"].items():
        lv = list(dict.fromkeys(ax["text"]))
        rows.append([f"axis {key}", ", ".join(lv[:12]) + (" ..." if len(lv) > 12 else "")])
    for kk in ("combine", "seeding", "base_seed", "method", "budget", "message", "best_index", "penalty"):
        if kk in meta:
            rows.append([kk, str(meta[kk])])
    doc.table(["quantity", "value"], rows)
    figs = {}
    if kind == "optimize":
        try:
            figs["optimize_history"] = optimize_figure(src)
        except MissingData as e:
            skipped["optimize_history"] = e.expected
        best = meta.get("best_index")
        if best is not None:
            b = int(best)
            obj = t["metrics"]["objective"][b]
            doc.p(f"Best evaluation #{b}: objective {obj:.6g}; parameters "
                  + ", ".join(f"{key} = {ax['text'][b]}" for key, ax in t["axes"].items()))
        cm = meta.get("confirm_metrics")
        if cm and "objective" in cm:
            err = confirm_error(meta, cm)
            doc.p(f"Confirmation run ({int(cm.get('n_trajectories', 0))} trajectories, fresh seeds): objective "
                  f"{plus_minus(cm['objective'], err, 6)}.")
    try:
        pages = sweep_figures(src, metrics=metrics, axes=axes, fixed=fixed)
        for i, f in enumerate(pages):
            figs[f"{'optimize_landscape' if kind == 'optimize' else 'sweep_metrics'}_{i + 1}"] = f
    except MissingData as e:
        skipped["sweep_metrics"] = e.expected
    caps = {n: ("Objective and parameters per evaluation, the best point (star) and the confirmation run."
                if n == "optimize_history" else
                "Metrics over the axes (error bars and cell values: standard errors of the means and fractions).")
            for n in figs}
    doc.h(2, "Figures")
    _emit(figs, out, fmt, dpi, doc, written, captions=caps)
    # table of the main metrics per point (first 40 rows)
    names = [m for m in ("objective", "L_mean_hbar", "L_std_hbar", "slip_fraction", "differential_n_mean") if m in t["metrics"]]
    hdr = ["#"] + [plain_text(key_label(k, meta)) for k in t["axes"]] + [plain_text(metric_name(m, meta)) for m in names]
    body = []
    for i in np.flatnonzero(done)[:40]:
        body.append([str(int(t["index"][i]))] + [ax["text"][i] for ax in t["axes"].values()]
                    + [compact(t["metrics"][m][i], 5) for m in names])
    doc.h(2, "Points")
    doc.table(hdr, body)
    if int(done.sum()) > 40:
        doc.p(f"... {int(done.sum()) - 40} more (mdrotor sweep ... --csv FILE writes them all).")
    failed = np.flatnonzero(np.asarray(t["failed"], bool))
    if failed.size:  # refused by the physics: no numbers, but the reader must see which and why
        doc.h(2, "Failed points" if kind == "sweep" else "Failed evaluations")
        doc.items([f"#{int(t['index'][i])} (" + ", ".join(f"{plain_text(key_label(key, meta))} = {ax['text'][i]}"
                                                           for key, ax in t["axes"].items()) + f"): {t['error'][i]}"
                   for i in failed[:40]]
                  + ([f"... {failed.size - 40} more (the 'error' column of the summary table)"] if failed.size > 40 else []))
    if kind == "optimize" and "confirm" in _groups(src):
        try:
            conf = read_point(src, "confirm")
            _report_run(src, out, fmt, dpi, doc, written, skipped, diffusion, k, prefix="confirm_", res=conf, title=False)
        except InputError as e:
            skipped["confirm"] = e.expected
    if skipped:
        doc.h(3, "Skipped figures")
        doc.items([f"{n}: {r}" for n, r in skipped.items()])
    doc.h(2, "Provenance")
    doc.table(["attribute", "value"], _provenance_rows(meta, ("package_version", "format_version", "kind", "source",
                                                              "spec_hash", "consolidated", "finished")))
    text = meta.get("sweep_text") or meta.get("optimize_text")
    if text:
        doc.h(2, "Sweep file" if kind == "sweep" else "Optimisation file")
        doc.pre(str(text))


def _report_quantum(src, out, fmt, dpi, doc, written, skipped):
    d = quantum_dict(src)
    doc.h(1, f"mdrotor report: {Path(src).name} (quantum rotor)")
    rows = [["allowed L", f"{d['allowed_L_offset']} mod {d['allowed_L_spacing']} ({d['symmetry_order']}-fold, "
                          f"{d['statistics']})"],
            ["ħ/(2πI)", f"{d['hbar_over_I_hz']:.5g} Hz"]]
    fin = d["stages"][-1]
    rows.append([f"final L (end of '{fin['name']}')", f"{compact(fin['L_mean_hbar'], 6)} ħ, spread {compact(fin['L_std_hbar'], 4)} ħ"])
    if d.get("verdict"):
        rows.append(["semiclassical answer", f"{d['verdict']}: {d['verdict_reason']}"])
    doc.table(["quantity", "value"], rows)
    doc.pre(text(d))
    doc.h(2, "Figures")
    try:
        _emit({"quantum_P_L": quantum_figure(d)}, out, fmt, dpi, doc, written, captions={"quantum_P_L": QUANTUM_CAPTION})
    except MissingData as e:
        skipped["quantum_P_L"] = e.expected
    doc.h(2, "Provenance")
    doc.table(["attribute", "value"], _provenance_rows(d, ("package_version", "format_version", "created", "source",
                                                           "source_kind")))
    doc.h(2, "Config (overrides applied)")
    doc.pre(str(d.get("config_text", "")))


def _groups(path) -> list:
    import h5py

    with h5py.File(path, "r") as f:
        return list(f)
