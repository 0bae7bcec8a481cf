# Stage 1: check each scan against its band config and cut it into chunks of dumps.


rule plan:
    input:
        scan=scan_path,
        band=band_config,
    output:
        out("plan", "{scan}.json"),
    params:
        run=RUN_SETS,
    log:
        log("plan"),
    benchmark:
        bench("plan")
    threads: 1
    shell:
        "{RFISIEVE} plan {input.scan:q} --band-config {input.band:q} {params.run}"
        " --out {output:q} 2> {log:q}"
