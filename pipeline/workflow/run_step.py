# Executed by Snakemake's `script:` directive for every rule; see pipeline/workflow/dispatch.py.
from pipeline.workflow.dispatch import run_from_snakemake

run_from_snakemake(snakemake)  # noqa: F821 (injected by Snakemake)
