# Stage 5: the night's end, from the scan records: failed_scans.csv (always; header
# only when no scan failed), the run's occupancy over every flagged scan (run.csv,
# run.h5) and the morning review page (report/index.html with its figures), labelled
# with the bands' emitters.  Then the verdict: it fails when any scan failed, so that
# the night's exit status says so while every output above is written.


rule review:
    input:
        records=[record(s) for s in SCANS],
        bands=band_configs(list(SCANS)),
        previous=[RUN["previous_run"]] if RUN["previous_run"] else [],
    output:
        # report(): `snakemake --report report.html` gathers the page and the run table
        csv=report(out("occupancy", "run.csv"), caption="../report/run_table.rst", category="Occupancy"),
        h5=out("occupancy", "run.h5"),
        html=report(out("report", "index.html"), caption="../report/review_page.rst", category="Review"),
        failed=out("failed_scans.csv"),
    params:
        previous=f"--previous {shlex.quote(RUN['previous_run'])}" if RUN["previous_run"] else "",
    log:
        log("review", "run"),
    benchmark:
        bench("review", "run")
    # the per-scan figures are drawn in parallel; the review is the night's last job
    threads: workflow.cores
    shell:
        "{RFISIEVE} wrap-up {OUTDIR:q} --records {input.records:q} --bands-dir {RUN[bands_dir]:q}"
        " --workers {threads} {params.previous} > {log:q} 2>&1"


rule verdict:
    input:
        out("failed_scans.csv"),
    output:
        out("logs", "verdict", "run.ok"),
    log:
        log("verdict", "run"),
    benchmark:
        bench("verdict", "run")
    threads: 1
    shell:
        "{RFISIEVE} verdict {input:q} --out {output:q} 2> {log:q}"
