"""``python -m rfisieve.cli.snakemake_process ARGS``: ``python -m snakemake ARGS`` as
``rfisieve run`` starts it.

The same command line and the same Snakemake; only the process's end differs: once
Snakemake's ``main`` has returned (its locks released, its log written, the jobs'
metadata stored) and the exit handlers have run, the process ends without Python's
module teardown (:func:`rfisieve.cli.ending.end_process`).  That teardown took
0.17 s after the review job of every night (a poll of /proc around ``rfisieve run``
on the bench scan and on one small scan, 2026-12-03).  ``rfisieve run --print-command``
prints the plain ``python -m snakemake`` command, which does the same work.
"""

import sys

#: The module's name as it appears in the command line (:mod:`rfisieve.cli.guard`
#: recognises both this and ``snakemake`` as a Snakemake process).
MODULE = "rfisieve.cli.snakemake_process"


def main():
    from rfisieve.cli.ending import end_process, exit_status
    from snakemake.cli import main as snakemake_main

    sys.argv[0] = "snakemake"  # Snakemake's messages name itself
    try:
        snakemake_main()
        rc = 0
    except SystemExit as stop:
        rc = exit_status(stop.code)
    end_process(rc)


if __name__ == "__main__":
    main()
