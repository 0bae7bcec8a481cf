# rfisieve: flag RFI in every scan of an observing run, then summarise occupancy.
#   snakemake --cores N --config inputs='<glob>' outdir=<dir>
# Settings: config/config.yaml (schema src/rfisieve/data/config.schema.yaml, which also
# holds the defaults) and config/bands/<band>.yaml. Helpers live in workflow/rules/common.smk.

from snakemake.utils import validate

from rfisieve.config import load as rfconfig

configfile: "config/config.yaml"


rfconfig.check_config_files(workflow.configfiles)  # one line per bad file, e.g. a key given twice
validate(config, str(rfconfig.schema_path("config.schema.yaml")))


include: "workflow/rules/common.smk"
include: "workflow/rules/flag.smk"
include: "workflow/rules/review.smk"


onstart:
    # One run per outdir, from any checkout (rfisieve run, our parent, may hold it for us).
    from rfisieve.cli import guard as rfguard

    rfguard.hold_outdir_lock_for_snakemake(OUTDIR, workflow.basedir, workflow.persistence.unlock)


rule all:
    default_target: True
    input:
        all_outputs(),
