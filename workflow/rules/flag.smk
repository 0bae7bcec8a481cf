# Stage 1-4 per scan: check the scan against the night's plan, run both detectors as
# parallel dask tasks over one read of each chunk, merge, count occupancy, and write
# the scan record <outdir>/scans/<scan>.json (flagged, or failed with stage and reason).
# Outputs beside the record: flags/<scan>.h5, occupancy/<scan>.csv, occupancy/<scan>.h5
# (and partial/<scan>.<detector>.h5 with keep_partial).  A job reserves `workers`
# cores for its dask workers (one core when the chunks run on a dask.distributed
# cluster, or when its scans are small: one chunk each) and flags its scans one after
# the other (BATCHES in common.smk).

for _i, (_first, _scans) in enumerate(BATCHES.items()):

    rule:
        name:
            f"flag_{_i + 1}"
        input:
            scans=[SCANS[s] for s in _scans],
            bands=band_configs(_scans),
        output:
            [record(s) for s in _scans],
        params:
            expect=expect(_scans),  # bound now; the shell text is formatted later
            run=RUN_SETS,
            options=FLAG_OPTIONS,
        log:
            log("flag", batch_name(_scans)),
        benchmark:
            bench("flag", batch_name(_scans))
        threads: batch_threads(_scans)
        shell:
            "{RFISIEVE} flag {input.scans:q} --outdir {OUTDIR:q} --expect {params.expect:q}"
            " {params.run} {params.options} --workers {threads} --scheduler {RUN[scheduler]:q}"
            " --jobs-at-once {JOBS_AT_ONCE} 2> {log:q}"
