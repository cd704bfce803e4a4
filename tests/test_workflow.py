"""Tests for the Snakemake workflow: profiles, resume after a kill, reproducibility, logs.

Every run happens in a fresh working folder under pytest's tmp dir (a copy of the Snakefile,
workflow/, config/, models/ and data/ with a small batch of demo datasets), so the real
results/ is never touched. The end-to-end runs are marked ``slow`` and ``mcmc``: each runs the
whole pipeline with tiny sampler settings. The profile and atomic-write tests are fast and run
by default.
"""

from __future__ import annotations

import os
import signal
import stat
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
import yaml

import workflow_runs as wr
from allolaw.io import write_text
from allolaw.model.spec import load_spec

PROFILES = wr.REPO / "config" / "profiles"


# --------------------------------------------------------------------------- profiles (fast)


@pytest.mark.parametrize("profile", ["local", "slurm"])
def test_profile_sets_threads_memory_and_runtime_for_every_rule(
    profile: str, tmp_path: Path
) -> None:
    settings = yaml.safe_load((PROFILES / profile / "config.yaml").read_text(encoding="utf-8"))
    rules = set(wr.list_rules(wr.make_workdir(tmp_path / "rules"))) - {"all"}
    assert rules, "snakemake --list-rules listed no rules"
    missing = sorted(rules - set(settings["set-resources"]))
    assert not missing, f"{profile} profile: no set-resources for {missing}"
    for rule in rules:
        resources = settings["set-resources"][rule]
        assert resources["mem_mb"] > 0
        assert resources["runtime"] > 0
    # One fit job per (dataset, model) with one thread per chain of the demo's four chains.
    assert settings["set-threads"]["fit_model"] >= 1
    assert {"mem_mb", "runtime"} <= set(settings["default-resources"])


def test_slurm_profile_names_partition_and_account_as_placeholders() -> None:
    text = (PROFILES / "slurm" / "config.yaml").read_text(encoding="utf-8")
    settings = yaml.safe_load(text)
    assert settings["executor"] == "slurm"
    assert settings["jobs"] >= 1
    defaults = settings["default-resources"]
    assert defaults["slurm_partition"].startswith("CHANGE_ME")
    assert defaults["slurm_account"].startswith("CHANGE_ME")
    assert settings["slurm-status-command"] in {"sacct", "squeue"}
    assert "slurm_partition" in text.split("executor:")[0], "placeholders are not documented"


def test_local_profile_reaches_every_job_of_the_batch(tmp_path: Path) -> None:
    # A dry run plans every job with the threads and resources from the profile, scaled down
    # to --cores (Snakemake never gives a local job more threads than cores).
    work = wr.make_workdir(tmp_path / "dry")
    out = wr.snakemake(work, "--profile", str(PROFILES / "local"), "--cores", "2", "-n",
                       timeout=120)
    assert out.returncode == 0, out.stdout[-3000:]
    profile = yaml.safe_load((PROFILES / "local" / "config.yaml").read_text(encoding="utf-8"))
    fit = profile["set-resources"]["fit_model"]
    jobs = wr.planned_jobs(out.stdout)
    fits = [job for job in jobs if job["rule"] == "fit_model"]
    assert len(fits) == sum(len(models) for models in wr.SMALL_BATCH.values())
    for job in fits:
        assert job["threads"] == min(2, profile["set-threads"]["fit_model"])
        assert job["resources"]["mem_mb"] == str(fit["mem_mb"])
        assert job["resources"]["runtime"] == str(fit["runtime"])
        # the costliest fits start first: each fit's priority is its spec's cost rank
        spec = load_spec(work / "models", job["wildcards"]["model"])
        assert job["priority"] == spec.cost_rank
    assert len({job["priority"] for job in fits}) > 1
    # every prepare job (seconds long, unlocks a dataset's fits) before any fit
    prepares = [job for job in jobs if job["rule"] == "prepare_dataset"]
    assert min(job["priority"] for job in prepares) > max(job["priority"] for job in fits)


# ------------------------------------------------------------------ atomic writes (fast)


def test_fit_stage_killed_while_writing_leaves_no_posterior(tmp_path: Path) -> None:
    # The fit stage writes posterior.nc through allolaw.io.atomic_path. Kill it with SIGKILL
    # while the file is being written: only a hidden .partial may remain, never posterior.nc,
    # so Snakemake can never take a half-written NetCDF for a finished fit.
    work = wr.make_workdir(tmp_path / "kill")
    dataset = "cell_scaling"
    prep = wr.allolaw(work, "prepare", "--dataset", dataset, timeout=180)
    assert prep.returncode == 0, prep.stdout + prep.stderr
    script = textwrap.dedent(
        f"""
        import sys, time
        import arviz as az
        import numpy as np
        import allolaw.model.fitting as fitting
        from allolaw.config import load_config

        def fake_fit(model, **kwargs):
            return az.from_dict(posterior={{"exponent": np.zeros((1, 5))}})

        def slow_write(self, path, **kwargs):
            with open(path, "wb") as fh:
                fh.write(b"half a NetCDF file")
                fh.flush()
            print("WRITING", flush=True)
            time.sleep(120)

        fitting.fit_model = fake_fit
        az.InferenceData.to_netcdf = slow_write
        config = load_config(["config/config.yaml"], [])
        fitting.fit_dataset_model(config, {dataset!r}, "pooled")
        """
    )
    proc = subprocess.Popen(
        [sys.executable, "-c", script], cwd=work, stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT, text=True, env=wr.job_env(),
    )
    try:
        lines = []
        for line in proc.stdout:
            lines.append(line)
            if line.strip() == "WRITING":
                break
        else:
            pytest.fail("the writer ended before writing:\n" + "".join(lines))
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()
    fit_dir = work / "results" / dataset / "pooled"
    assert not (fit_dir / "posterior.nc").exists()
    leftovers = list(fit_dir.glob(".posterior.nc.*.partial"))
    assert len(leftovers) == 1, "the kill did not land during the write"
    assert leftovers[0].read_bytes() == b"half a NetCDF file"


def test_atomic_writes_leave_files_readable_by_others(tmp_path: Path) -> None:
    # On a cluster the reports are read by other users of the shared file system: an output
    # written through a private temporary file must end up with the mode open() would give it.
    umask = os.umask(0o022)
    try:
        write_text(tmp_path / "report.html", "<html></html>")
    finally:
        os.umask(umask)
    assert stat.S_IMODE((tmp_path / "report.html").stat().st_mode) == 0o644


# -------------------------------------------------------------- end-to-end runs (slow, MCMC)


@pytest.fixture(scope="module")
def reference_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The small batch run once, uninterrupted, with the local profile."""
    work = wr.make_workdir(tmp_path_factory.mktemp("reference"), wr.ONE_DATASET)
    out = wr.run_batch(work, "--profile", str(PROFILES / "local"))
    assert out.returncode == 0, out.stdout[-5000:]
    return work


@pytest.mark.slow
@pytest.mark.mcmc
def test_every_rule_writes_its_log_and_benchmark(reference_run: Path) -> None:
    expected = wr.expected_logs(wr.ONE_DATASET)
    missing = [str(p) for p in expected if not (reference_run / p).is_file()]
    assert not missing, f"missing log/benchmark files: {missing}"
    for path in expected:
        if path.suffix == ".tsv":  # Snakemake benchmark: header + one row per repeat
            rows = (reference_run / path).read_text(encoding="utf-8").splitlines()
            assert rows[0].startswith("s\t"), rows[0]
            assert len(rows) == 2
            assert float(rows[1].split("\t")[0]) > 0


@pytest.mark.slow
@pytest.mark.mcmc
def test_finished_batch_has_nothing_left_to_do(reference_run: Path) -> None:
    out = wr.snakemake(reference_run, "--profile", str(PROFILES / "local"), "--cores", "2",
                       "--configfile", wr.QUICK, "-n", timeout=120)
    assert out.returncode == 0, out.stdout[-3000:]
    assert "Nothing to be done" in out.stdout, out.stdout[-3000:]


@pytest.mark.slow
@pytest.mark.mcmc
def test_rerun_with_same_seed_gives_byte_identical_tables(
    reference_run: Path, tmp_path: Path
) -> None:
    work = wr.make_workdir(tmp_path / "again", wr.ONE_DATASET)
    out = wr.run_batch(work, "--profile", str(PROFILES / "local"))
    assert out.returncode == 0, out.stdout[-5000:]
    wr.assert_same_results(reference_run, work)


@pytest.mark.slow
@pytest.mark.mcmc
def test_batch_killed_during_a_fit_resumes_to_the_same_outputs(
    reference_run: Path, tmp_path: Path
) -> None:
    work = wr.make_workdir(tmp_path / "resume", wr.ONE_DATASET)
    proc = wr.start_batch(work, "--profile", str(PROFILES / "local"))
    try:
        running = wr.wait_for_fit_sampling(work, proc, timeout=600)
        os.killpg(proc.pid, signal.SIGKILL)  # Snakemake and every job it started
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    for _ in range(50):  # the jobs ran in Snakemake's process group: all of them are gone
        try:
            os.killpg(proc.pid, 0)
        except ProcessLookupError:
            break
        time.sleep(0.2)
    else:
        pytest.fail("processes of the killed batch are still running")
    posterior = work / running / "posterior.nc"
    assert not posterior.exists(), f"{posterior} exists although its fit was killed"
    # Whatever did finish is complete: every posterior under its final name opens.
    for path in (work / "results").glob("*/*/posterior.nc"):
        wr.read_posterior(path)

    # A killed Snakemake leaves its lock behind; the user releases it, then reruns as before.
    unlock = wr.snakemake(work, "--unlock", timeout=120)
    assert unlock.returncode == 0, unlock.stdout[-3000:]
    out = wr.run_batch(work, "--profile", str(PROFILES / "local"))
    assert out.returncode == 0, out.stdout[-5000:]
    assert "Finished jobid" in out.stdout
    wr.assert_same_results(reference_run, work)
