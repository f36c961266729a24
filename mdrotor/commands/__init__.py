"""The command line: argument parsing and text rendering only, one module per command.

main          the parser and dispatch (`mdrotor ...`)
common        what every command shares: --set, --json, exit statuses, the --workers / --scheduler check
crystal, run, rotor, compare_trap, quantum, sweep, optimize, report, electrodes: one command each
"""
