"""Helpers for the workflow and cluster tests: throw-away working folders, Snakemake runs,
and comparison of two runs' results.

Not a test module (no ``test_`` prefix); ``tests/test_workflow.py`` and
``tests/test_cluster.py`` import it.
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import xarray as xr
import yaml

__all__ = [
    "ONE_DATASET",
    "QUICK",
    "REPO",
    "SMALL_BATCH",
    "allolaw",
    "assert_same_results",
    "expected_logs",
    "job_env",
    "list_rules",
    "make_workdir",
    "planned_jobs",
    "read_posterior",
    "run_batch",
    "snakemake",
    "start_batch",
    "wait_for_fit_sampling",
]

REPO = Path(__file__).resolve().parents[1]

# Two demo datasets x two models (dry-run and kill tests): small enough for a test, big enough to
# have one job of every rule per dataset and several jobs queued at once.
SMALL_BATCH = {"cell_scaling": ["pooled", "taxa"],
               "tree_biomass": ["individuals_together", "individuals_within"]}
# One dataset x two models (resume, reproducibility and SLURM tests, which run it 2-3 times).
ONE_DATASET = {"cell_scaling": ["pooled", "taxa"]}

# Sampler overrides merged over config.yaml with --configfile (the same path users take); tiny
# chains, so checks may warn or fail on ESS, which is fine here: the tests compare runs. No
# chain extension (it would run on nearly every tiny fit; tests/test_model_extending.py tests it).
QUICK = "quick.yaml"
_QUICK_SAMPLER = {"sampler": {"chains": 2, "draws": 150, "warmup": 150, "extension_draws": 0}}

_GROUPS = ("posterior", "sample_stats", "log_likelihood", "posterior_predictive", "prior",
           "prior_predictive", "observed_data", "constant_data")
# Wall-clock sampler statistics differ between runs by nature.
_CLOCK_VARS = re.compile(r"time|perf_counter")


def make_workdir(dest: Path, batch: dict[str, list[str]] = SMALL_BATCH) -> Path:
    """Copy the workflow, models and demo data to ``dest`` with a batch of demo datasets."""
    dest.mkdir(parents=True, exist_ok=True)
    shutil.copy2(REPO / "Snakefile", dest / "Snakefile")
    for folder in ("workflow", "models", "data"):
        shutil.copytree(REPO / folder, dest / folder, symlinks=False)
    (dest / "config").mkdir()
    shutil.copy2(REPO / "config" / "schema.yaml", dest / "config" / "schema.yaml")  # follows link
    config = yaml.safe_load((REPO / "config" / "config.yaml").read_text(encoding="utf-8"))
    datasets = {}
    for name, models in batch.items():
        entry = dict(config["datasets"][name])
        entry["models"] = list(models)
        entry["primary_model"] = models[-1]
        entry.pop("curvature_audit", None)
        datasets[name] = entry
    config["datasets"] = datasets
    (dest / "config" / "config.yaml").write_text(
        yaml.safe_dump(config, sort_keys=False), encoding="utf-8"
    )
    (dest / QUICK).write_text(yaml.safe_dump(_QUICK_SAMPLER), encoding="utf-8")
    return dest


def job_env() -> dict[str, str]:
    """Environment for the runs: compile caches shared between runs (they hold no results)."""
    env = dict(os.environ)
    env.setdefault("ALLOLAW_CACHE_DIR", str(REPO / ".cache" / "allolaw"))
    env["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{env.get('PATH', '')}"
    return env


def snakemake(work: Path, *args: str, timeout: float,
              wrapper: tuple[str, ...] = ()) -> subprocess.CompletedProcess:
    """Run Snakemake in ``work``; stdout and stderr together, also saved to ``work``."""
    proc = start_batch(work, *args, wrapper=wrapper, configfile=False)
    try:
        proc.wait(timeout=timeout)
    finally:  # timeout or interrupted test: stop Snakemake and its jobs (SIGINT cancels them)
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGINT)
            try:
                proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait()
    text = Path(proc.args_log).read_text(encoding="utf-8", errors="replace")
    return subprocess.CompletedProcess(proc.args, proc.returncode, text, "")


def run_batch(work: Path, *args: str, timeout: float = 1800, cores: str | None = "2",
              wrapper: tuple[str, ...] = ()) -> subprocess.CompletedProcess:
    """Run the whole small batch with the quick sampler settings."""
    extra = ["--cores", cores] if cores else []
    return snakemake(work, *args, *extra, "--configfile", QUICK, timeout=timeout,
                     wrapper=wrapper)


def start_batch(work: Path, *args: str, wrapper: tuple[str, ...] = (),
                configfile: bool = True) -> subprocess.Popen:
    """Start Snakemake in its own session (so the test can kill it and all its jobs)."""
    extra = ["--cores", "2", "--configfile", QUICK] if configfile else []
    stamp = time.strftime("%H%M%S") + f"-{time.monotonic_ns() % 10**6}"
    log_file = work / f"snakemake-{stamp}.log"
    cmd = [*wrapper, sys.executable, "-m", "snakemake", *args, *extra]
    with log_file.open("w", encoding="utf-8") as out:
        proc = subprocess.Popen(cmd, cwd=work, stdout=out, stderr=subprocess.STDOUT,
                                env=job_env(), start_new_session=True)
    proc.args_log = str(log_file)
    return proc


def allolaw(work: Path, *args: str, timeout: float) -> subprocess.CompletedProcess:
    """Run one ``allolaw`` stage in ``work`` (reading its config/config.yaml)."""
    cmd = [sys.executable, "-m", "allolaw", args[0], "--config", "config/config.yaml", *args[1:]]
    return subprocess.run(cmd, cwd=work, capture_output=True, text=True, env=job_env(),
                          timeout=timeout, check=False)


def list_rules(work: Path) -> list[str]:
    """Rule names of the workflow, as Snakemake lists them."""
    out = subprocess.run([sys.executable, "-m", "snakemake", "--list-rules"], cwd=work,
                         capture_output=True, text=True, env=job_env(), timeout=120,
                         check=True)
    return [line.strip() for line in out.stdout.splitlines() if line.strip()]


def planned_jobs(dry_run_output: str) -> list[dict]:
    """Jobs of a ``snakemake -n`` printout: rule, wildcards, priority, threads, resources."""
    jobs: list[dict] = []
    for line in dry_run_output.splitlines():
        head = re.match(r"^(?:local)?rule (\w+):$", line.strip())
        if head:
            jobs.append({"rule": head.group(1), "threads": 1, "priority": 0, "wildcards": {},
                         "resources": {}})
        elif jobs and line.strip().startswith("wildcards:"):
            items = line.split(":", 1)[1].split(",")
            jobs[-1]["wildcards"] = dict(item.strip().split("=", 1) for item in items)
        elif jobs and line.strip().startswith("priority:"):
            jobs[-1]["priority"] = int(line.split(":", 1)[1])
        elif jobs and line.strip().startswith("threads:"):
            jobs[-1]["threads"] = int(line.split(":", 1)[1])
        elif jobs and line.strip().startswith("resources:"):
            items = line.split(":", 1)[1].split(",")
            jobs[-1]["resources"] = dict(item.strip().split("=", 1) for item in items)
    return jobs


def expected_logs(batch: dict[str, list[str]]) -> list[Path]:
    """The log and benchmark files the rule files declare for ``batch``."""
    paths = [Path("logs/index.log"), Path("logs/benchmarks/index.tsv")]
    for dataset, models in batch.items():
        stems = ["prepare", "compare"]  # the compare job also writes the report
        stems += [f"fit_{m}" for m in models]  # each fit job also checks its fit
        paths += [Path("logs") / dataset / f"{s}.log" for s in stems]
        paths += [Path("logs/benchmarks") / dataset / f"{s}.tsv" for s in stems]
    return paths


def wait_for_fit_sampling(work: Path, proc: subprocess.Popen, *, timeout: float) -> Path:
    """Wait until a fit job logs that sampling started; return its results folder."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        for log in sorted((work / "logs").glob("*/fit_*.log")):
            if "sampling started" in log.read_text(encoding="utf-8", errors="replace"):
                model = log.stem.removeprefix("fit_")
                return Path("results") / log.parent.name / model
        if proc.poll() is not None:
            break
        time.sleep(0.5)
    msg = f"no fit started sampling within {timeout} s (Snakemake exit {proc.poll()})"
    raise AssertionError(msg)


def read_posterior(path: Path) -> dict[str, xr.Dataset]:
    """Every group of a posterior.nc, loaded (fails on a truncated or partial file)."""
    groups = {}
    for group in _GROUPS:
        with xr.open_dataset(path, group=group, engine="h5netcdf") as ds:
            groups[group] = ds.load()
    return groups


def assert_same_results(first: Path, second: Path) -> None:
    """Two runs' results agree: tables byte for byte, posterior draws exactly.

    CSV and JSON files must be byte-identical; each ``posterior.nc`` must hold the same
    variables with the same values in every group (its attributes hold run times, so the files
    themselves differ).
    """
    files_a = _result_files(first)
    files_b = _result_files(second)
    assert files_a == files_b, f"different result files: {sorted(files_a ^ files_b)}"
    differ = [
        str(rel) for rel in sorted(files_a)
        if rel.suffix in {".csv", ".json"}
        and (first / rel).read_bytes() != (second / rel).read_bytes()
    ]
    assert not differ, f"tables differ between the runs: {differ}"
    posteriors = sorted(rel for rel in files_a if rel.name == "posterior.nc")
    assert posteriors, "no posterior.nc in the results"
    for rel in posteriors:
        a, b = read_posterior(first / rel), read_posterior(second / rel)
        for group in _GROUPS:
            names = sorted(v for v in a[group].data_vars if not _CLOCK_VARS.search(v))
            assert names == sorted(
                v for v in b[group].data_vars if not _CLOCK_VARS.search(v)
            ), f"{rel} {group}: different variables"
            for name in names:
                assert np.array_equal(
                    a[group][name].values, b[group][name].values, equal_nan=True
                ), f"{rel} {group}/{name} differs between the runs"


def _result_files(work: Path) -> set[Path]:
    root = work / "results"
    return {
        p.relative_to(work) for p in root.rglob("*")
        if p.is_file() and not p.name.startswith(".")
    }
