# rfisieve: flag RFI in every scan of an observing run, then summarise occupancy.
#   snakemake --cores N --config inputs='<glob>' outdir=<dir>
# Settings: config/config.yaml (schema workflow/schemas/config.schema.yaml) and
# config/bands/<band>.yaml. Helpers live in workflow/rules/common.smk.

from snakemake.utils import validate

configfile: "config/config.yaml"


validate(config, "workflow/schemas/config.schema.yaml")


include: "workflow/rules/common.smk"
include: "workflow/rules/plan.smk"
include: "workflow/rules/detect.smk"
include: "workflow/rules/merge.smk"
include: "workflow/rules/occupancy.smk"
include: "workflow/rules/review.smk"


rule all:
    input:
        all_outputs(),
