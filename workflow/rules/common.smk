# Validation and input functions only; all logic lives in the allolaw package.
import json
import shlex
import sys

from allolaw.config import validate_config
from allolaw.model.spec import NO_BREAK_SUFFIX, load_spec, models_to_fit

# The package fills defaults from the same schema Snakemake validated against.
CONFIG = validate_config(dict(config), source="snakemake config")
RESULTS = CONFIG["results_dir"]
REPORTS = CONFIG["reports_dir"]
LOGS = "logs"
DATASETS = sorted(CONFIG["datasets"])

# The interpreter running Snakemake runs the CLI too, so no environment needs activating.
ALLOLAW = f"{shlex.quote(sys.executable)} -m allolaw"
# Every CLI call reads the same base file as Snakemake plus whatever came from the command line
# (--configfile / --config), passed as key overrides, so both always see one configuration.
_BASE = [] if workflow.config_settings.replace_workflow_config else ["--config config/config.yaml"]
_OVERRIDES = [
    f"--set {shlex.quote(f'{key}={json.dumps(value)}')}"
    for key, value in workflow.config_settings.overwrite_config.items()
]
CLI_OPTS = " ".join([*_BASE, *_OVERRIDES])


wildcard_constraints:
    dataset="|".join(DATASETS),
    model="[A-Za-z0-9_-]+",


def dataset_sources(wildcards):
    # the data files and the dataset's tree (a changed tree reruns prepare)
    ds = CONFIG["datasets"][wildcards.dataset]
    return [s["file"] for s in ds["sources"]] + ([ds["tree"]] if ds.get("tree") else [])


def model_spec(wildcards):
    # a matched model without break is derived from its breakpoint spec's file
    return f"{CONFIG['models_dir']}/{wildcards.model.removesuffix(NO_BREAK_SUFFIX)}.yaml"


def fit_priority(wildcards):
    # the costliest fits start first (ModelSpec.cost_rank), so none starts last and runs alone
    return load_spec(CONFIG["models_dir"], wildcards.model).cost_rank


def dataset_posteriors(wildcards):
    models = models_to_fit(CONFIG["models_dir"], CONFIG["datasets"][wildcards.dataset]["models"])
    return [f"{RESULTS}/{wildcards.dataset}/{m}/posterior.nc" for m in models]


def dataset_checks(wildcards):
    models = models_to_fit(CONFIG["models_dir"], CONFIG["datasets"][wildcards.dataset]["models"])
    return [f"{RESULTS}/{wildcards.dataset}/checks/{m}.json" for m in models]


def all_reports():
    return [f"{REPORTS}/{d}.html" for d in DATASETS] + [f"{REPORTS}/index.html"]
