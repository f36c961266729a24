"""Figures and the one-page report of runs, sweeps and optimisations; it computes nothing another package owns.

style           the look of every figure and the layout checks each passes
inputs          what a figure reads: the kind of a file, MissingData, matplotlib when a figure is drawn
labels          how quantities, units, config keys, metrics, pinning terms and frames are written
run_figures     the figures of one run: schedule, L histograms with the allowed-L ladder, series, phonons, lines, coherence
study_figures   sweep and optimisation figures
quantum_figure  the quantum rotor's P(L) beside the ensemble
page            the report page (Markdown / HTML) and its figure files: write_report, used by `mdrotor report`
"""
