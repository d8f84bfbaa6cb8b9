# Long-slit reduction of one night. Rules live in pipeline/rules/*.smk and only
# wire files to the step adapters in pipeline/ (see DEVELOPERS.md).
from snakemake.utils import min_version, validate

min_version("8.0")

configfile: f"{workflow.basedir}/config/config.yaml"

from pipeline.workflow.config_check import check_config

# Every problem on its own line, naming the key; then Snakemake fills the schema defaults.
check_config(config, f"{workflow.basedir}/config/schema.yaml")
validate(config, "config/schema.yaml")


include: "pipeline/rules/common.smk"
include: "pipeline/rules/night.smk"
include: "pipeline/rules/ccd.smk"
include: "pipeline/rules/wavelength.smk"
include: "pipeline/rules/extraction.smk"
include: "pipeline/rules/fluxcal.smk"
include: "pipeline/rules/products.smk"


# Cheap gathering jobs run on the submitting host when a cluster executor is used.
localrules:
    all,
    night_log,
    manifest,
    night_report,


rule all:
    input:
        all_products(),
    default_target: True
