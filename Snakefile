# rfisieve: flag RFI in every scan of an observing run, then summarise occupancy.
#   snakemake --cores N --config inputs='<glob>' outdir=<dir>
# Settings: config/config.yaml (schema workflow/schemas/config.schema.yaml) and
# config/bands/<band>.yaml. Helpers live in workflow/rules/common.smk.

from snakemake.utils import validate

configfile: "config/config.yaml"


validate(config, "workflow/schemas/config.schema.yaml")


include: "workflow/rules/common.smk"
include: "workflow/rules/flag.smk"
include: "workflow/rules/review.smk"


rule all:
    default_target: True
    input:
        all_outputs(),
