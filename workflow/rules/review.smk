# Stage 5: the run's occupancy over every scan (run.csv, run.h5) and the morning
# review page (report/index.html with its figures), labelled with the bands' emitters.


rule review:
    input:
        h5=expand(out("occupancy", "{scan}.h5"), scan=SCANS),
        bands=sorted({rfconfig.band_config_path(RUN["bands_dir"], b) for b in BANDS.values()}),
        previous=[RUN["previous_run"]] if RUN["previous_run"] else [],
    output:
        csv=out("occupancy", "run.csv"),
        h5=out("occupancy", "run.h5"),
        html=out("report", "index.html"),
    params:
        previous=f"--previous {shlex.quote(RUN['previous_run'])}" if RUN["previous_run"] else "",
    log:
        log("review", "run"),
    benchmark:
        bench("review", "run")
    threads: 1
    shell:
        "{RFISIEVE} review {OUTDIR:q} --scans {input.h5:q} --bands-dir {RUN[bands_dir]:q}"
        " {params.previous} > {log:q} 2>&1"
