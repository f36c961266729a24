"""Figures and the one-page report of runs, sweeps and optimisations; it computes nothing another package owns.

style     the look of every figure and the layout checks each passes
figures   the figure functions and the Markdown / HTML page writer
"""
