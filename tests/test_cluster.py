"""The small batch on a real SLURM cluster: a throw-away single node on localhost.

Run with ``pytest -m cluster`` (as root: it installs Debian's SLURM packages with
``.ci/slurm/install.sh``, starts munged, slurmctld and slurmd with ``.ci/slurm/start.sh`` and
stops exactly those PIDs with ``.ci/slurm/stop.sh``). The batch goes through
``snakemake --executor slurm --profile <copy of config/profiles/slurm>``; the copy only fills
in the partition and account placeholders, asks squeue for job status (this cluster has no
accounting database) and caps threads at the node's CPUs. The same batch then runs with the
local profile, and the two must agree: same seeds, same numbers.
"""

from __future__ import annotations

import os
import re
import subprocess
from pathlib import Path

import pytest
import yaml

import workflow_runs as wr

pytestmark = [pytest.mark.cluster, pytest.mark.mcmc]

SCRIPTS = wr.REPO / ".ci" / "slurm"
PARTITION = "allolaw"
ACCOUNT = "allolaw-ci"
# Jobs of the one-dataset batch (run twice: SLURM, local): prepare, compare (which also writes
# the report), one fit (which also checks) per (dataset, model), and one index.
N_JOBS = sum(2 + len(models) for models in wr.ONE_DATASET.values()) + 1


@pytest.fixture(scope="module")
def slurm_cluster(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A running single-node cluster; its daemons are stopped by PID afterwards."""
    if os.geteuid() != 0:
        pytest.fail("the cluster test installs packages and starts daemons: run it as root")
    state = tmp_path_factory.mktemp("slurm")
    env = {**os.environ, "ALLOLAW_SLURM_PARTITION": PARTITION}
    subprocess.run(["bash", str(SCRIPTS / "install.sh")], check=True, timeout=900)
    try:
        subprocess.run(["bash", str(SCRIPTS / "start.sh"), str(state)], check=True,
                       timeout=180, env=env)
        yield state
    finally:
        subprocess.run(["bash", str(SCRIPTS / "stop.sh"), str(state)], check=False,
                       timeout=120)


def test_batch_on_slurm_matches_the_local_run(slurm_cluster: Path, tmp_path: Path) -> None:
    work = wr.make_workdir(tmp_path / "slurm", wr.ONE_DATASET)
    profile = _test_profile(work / "profile-slurm-test")
    # snakemake ignores SIGTERM while it waits on jobs; SIGINT makes it cancel them and exit.
    out = wr.run_batch(
        work, "--profile", str(profile), "--verbose", cores=None, timeout=1260,
        wrapper=("timeout", "-s", "INT", "1200"),
    )
    assert out.returncode == 0, out.stdout[-6000:]

    # Every job went through sbatch and SLURM ran it to completion.
    sbatch_calls = re.findall(r"^sbatch call: sbatch .*$", out.stdout, flags=re.MULTILINE)
    assert len(sbatch_calls) == N_JOBS, f"{len(sbatch_calls)} sbatch calls, {N_JOBS} jobs"
    for call in sbatch_calls:  # the profile's placeholders, as filled in above
        assert f" -p {PARTITION} " in call, call
        assert f" -A {ACCOUNT} " in call, call
    job_ids = re.findall(r"submitted with SLURM jobid (\d+)", out.stdout)
    assert len(job_ids) == N_JOBS
    # for the CI log (.ci/run shows the output of this passed test): what was submitted
    print(f"{len(sbatch_calls)} jobs submitted with sbatch, SLURM job ids {', '.join(job_ids)}")
    for call in sbatch_calls:
        print(call[:300])
    for job_id in job_ids:
        shown = subprocess.run(["scontrol", "-o", "show", "job", job_id], capture_output=True,
                               text=True, check=True, timeout=30).stdout
        assert "JobState=COMPLETED" in shown, shown
    fit_log = (work / "logs" / "cell_scaling" / "fit_pooled.log").read_text(encoding="utf-8")
    threads = _node_cpus()
    assert f"{min(threads, 4)} thread(s)" in fit_log, fit_log[-2000:]

    local = wr.make_workdir(tmp_path / "local", wr.ONE_DATASET)
    out_local = wr.run_batch(local, "--profile", str(wr.REPO / "config/profiles/local"),
                             cores=str(threads), timeout=1260)
    assert out_local.returncode == 0, out_local.stdout[-6000:]
    wr.assert_same_results(local, work)


def _test_profile(dest: Path) -> Path:
    # The slurm profile as committed, with the placeholders filled for this test cluster.
    settings = yaml.safe_load(
        (wr.REPO / "config" / "profiles" / "slurm" / "config.yaml").read_text(encoding="utf-8")
    )
    settings["default-resources"].update(slurm_partition=PARTITION, slurm_account=ACCOUNT)
    settings["slurm-status-command"] = "squeue"  # no slurmdbd here, so no sacct
    settings["slurm-init-seconds-before-status-checks"] = 5
    settings["slurm-keep-successful-logs"] = True
    cpus = _node_cpus()
    settings["set-threads"] = {rule: min(n, cpus) for rule, n in settings["set-threads"].items()}
    dest.mkdir(parents=True)
    (dest / "config.yaml").write_text(yaml.safe_dump(settings, sort_keys=False),
                                      encoding="utf-8")
    return dest


def _node_cpus() -> int:
    out = subprocess.run(["sinfo", "-h", "-o", "%c"], capture_output=True, text=True,
                         check=True, timeout=30).stdout
    return int(out.split()[0].rstrip("+"))
