# Stage 4: per-scan occupancy, one row per channel (CSV) and the exact counts (HDF5).
# The band config is an input (through the mask) so a band edit recounts that band only.


rule occupancy:
    input:
        mask=out("flags", "{scan}.h5"),
        band=band_config,
    output:
        csv=out("occupancy", "{scan}.csv"),
        h5=out("occupancy", "{scan}.h5"),
    log:
        log("occupancy"),
    benchmark:
        bench("occupancy")
    threads: 1
    shell:
        "{RFISIEVE} occupancy {input.mask:q} --csv {output.csv:q} --h5 {output.h5:q} 2> {log:q}"
