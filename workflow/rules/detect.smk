# Stage 2: the two detectors, separate jobs that may run at the same time. Each spreads
# the scan's chunks over `workers` dask workers, so it reserves that many cores
# (one core when the chunks run on a dask.distributed cluster).

for _detector in ("sk", "sumthreshold"):

    rule:
        name:
            f"detect_{_detector}"
        input:
            scan=scan_path,
            band=band_config,
            plan=out("plan", "{scan}.json"),
        output:
            temp(out("partial", f"{{scan}}.{_detector}.h5")),
        params:
            detector=_detector,  # params are bound now; the shell text is formatted later
            run=RUN_SETS,
        log:
            log(f"detect_{_detector}"),
        benchmark:
            bench(f"detect_{_detector}")
        threads: DASK_THREADS
        shell:
            "{RFISIEVE} detect {input.scan:q} --detector {params.detector} --plan {input.plan:q}"
            " --band-config {input.band:q} {params.run} --workers {threads}"
            " --scheduler {RUN[scheduler]:q} --jobs-at-once {JOBS_AT_ONCE} --out {output:q} 2> {log:q}"
