# Executed by Snakemake's `script:` directive for every rule; see pipeline/workflow/dispatch.py.
# (Snakemake runs it as a program; importing it, as the doctest collection does, does nothing.)
from pipeline.workflow.dispatch import run_from_snakemake

if __name__ == "__main__":
    run_from_snakemake(snakemake)  # noqa: F821 (injected by Snakemake)
