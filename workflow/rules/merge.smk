# Stage 3: combine both detectors' partial masks with the upstream, invalid and static
# bits, grow them (SIR operator) and apply the occupancy cuts -> the scan's mask file.


rule merge:
    input:
        scan=scan_path,
        band=band_config,
        partial=[out("partial", "{scan}.sk.h5"), out("partial", "{scan}.sumthreshold.h5")],
    output:
        out("flags", "{scan}.h5"),
    params:
        run=RUN_SETS,
    log:
        log("merge"),
    benchmark:
        bench("merge")
    threads: 1
    shell:
        "{RFISIEVE} merge {input.scan:q} --partial {input.partial:q} --band-config {input.band:q}"
        " {params.run} --out {output:q} 2> {log:q}"
