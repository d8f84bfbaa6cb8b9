# Shared set-up: the demo night, the night's inventory (taken at parse time,
# from headers only) and the path helpers every rule file uses.
import sys
from pathlib import Path

from pipeline.inventory import take_inventory

RAW = Path(config["raw_dir"])
OUT = Path(config["out_dir"])
INSTRUMENT = config["instrument"]
RUN_STEP = "../run_step.py"


def _demo_night_needed():
    if not config.get("make_demo_night_if_missing", True):
        return False
    if RAW.resolve() != (Path(workflow.basedir) / "demo_data" / "raw").resolve():
        return False
    return not any(RAW.glob("*.fits"))


if _demo_night_needed():
    import subprocess
    print(f"simulating the demo night into {RAW} (first run only)", file=sys.stderr)
    subprocess.run([sys.executable, "-m", "demo_data.simulate", "--out", str(RAW)],
                   check=True, cwd=workflow.basedir)

NIGHT = take_inventory(RAW, INSTRUMENT)
# Snakemake hides warnings raised while it parses; say the rejections here (also in night_log.ecsv).
for _problem in NIGHT.problems():
    print(f"night inventory: {_problem}", file=sys.stderr)


def out(*parts):
    return str(OUT.joinpath(*parts))


def log_path(rule_name, name):
    return str(OUT / "logs" / rule_name / f"{name}.log")
