# Long-slit reduction of one night. Rules live in pipeline/rules/*.smk and only wire files to
# the step adapters; every path, param and product list comes from the night's plan
# (pipeline/workflow/plan.py, see DEVELOPERS.md).
import sys

from snakemake.utils import min_version

min_version("8.0")


configfile: f"{workflow.basedir}/config/config.yaml"


from pipeline.workflow.layers import layered_config
from pipeline.workflow.plan import NightPlan, ensure_demo_night

# schema defaults < the instrument file the night names < the night (config/config.yaml,
# --configfile, --config); every problem on its own line, naming the file and the key.
SETTINGS = layered_config(config, f"{workflow.basedir}/config/schema.yaml", root=workflow.basedir)
ensure_demo_night(SETTINGS["raw_dir"], workflow.basedir,
                  enabled=SETTINGS["make_demo_night_if_missing"])
PLAN = NightPlan.from_config(SETTINGS)
# Snakemake hides warnings raised while it parses; say the rejections here (also in night_log.ecsv).
for _problem in PLAN.night.problems():
    print(f"night inventory: {_problem}", file=sys.stderr)
RUN_STEP = "../workflow/run_step.py"


include: "pipeline/rules/night.smk"
include: "pipeline/rules/ccd.smk"
include: "pipeline/rules/wavelength.smk"
include: "pipeline/rules/extraction.smk"
include: "pipeline/rules/fluxcal.smk"
include: "pipeline/rules/combine.smk"
include: "pipeline/rules/products.smk"


# Cheap gathering jobs run on the submitting host when a cluster executor is used.
localrules:
    all,
    night_log,
    combine_spectra,
    manifest,
    night_report,


rule all:
    input:
        PLAN.all_products(),
    default_target: True
