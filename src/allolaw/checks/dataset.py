"""The ``check`` stage: one fit checked, refitted once on divergences, written as JSON.

:func:`check_dataset_model` loads a fit, checks it (:mod:`allolaw.checks.convergence`), refits
once with a higher target acceptance when the sampler diverged, adds posterior and prior
predictive checks (:mod:`allolaw.checks.predictive`) and writes ``results/<d>/checks/<m>.json``.
A failed check is written, never dropped: the verdict travels on to the comparison and the
report.
"""

from __future__ import annotations

import json
import logging
import math
import time
from typing import Any

import numpy as np

from allolaw import paths
from allolaw.checks.convergence import CheckResult, check_fit
from allolaw.checks.predictive import innermost_groups, ppc_findings, predictive_checks
from allolaw.checks.reading import read_posterior
from allolaw.errors import UserError
from allolaw.io import atomic_path, write_json

__all__ = ["chain_extension", "check_dataset_model"]

log = logging.getLogger(__name__)


def check_dataset_model(
    config: dict[str, Any], dataset: str, model: str, *, threads: int = 1
) -> str:
    """The ``check`` stage: check one fit, refit once on divergences, write the check JSON.

    Parameters
    ----------
    config
        Validated batch config.
    dataset, model
        Names from the config.
    threads
        Cores for the one refit, if needed.

    Returns
    -------
    str
        The verdict, ``pass``, ``warn`` or ``fail``.
    """
    results = config["results_dir"]
    post_path = paths.posterior_path(results, dataset, model)
    if not post_path.is_file():
        msg = f"{post_path}: no fit of model '{model}' for dataset '{dataset}'; run `allolaw fit`"
        raise UserError(msg)
    start = time.perf_counter()
    idata = read_posterior(post_path)
    result, findings = check_fit(idata)
    refit: dict[str, Any] | None = None
    if result.n_divergent > 0:
        target = float(config["sampler"]["refit_target_acceptance"])
        before = _refit_numbers(result)
        log.info("%s/%s: %d divergences; refitting once with target acceptance %.3f",
                 dataset, model, result.n_divergent, target)
        from allolaw.model.fitting import fit_dataset_model

        refit_start = time.perf_counter()
        idata = fit_dataset_model(config, dataset, model, threads=threads,
                                  target_acceptance=target)
        refit_seconds = time.perf_counter() - refit_start
        result, findings = check_fit(idata)
        refit = {
            "reason": f"{before['n_divergent']} divergent transitions in the first fit",
            "target_acceptance": target,
            "before": before,
            "after": _refit_numbers(result),
        }
        # the refit's wall time goes to the posterior's attributes (which hold run times
        # anyway), not to the check JSON, which reruns must reproduce byte for byte
        idata.attrs["refit"] = json.dumps({**refit, "seconds": round(refit_seconds, 3)},
                                          sort_keys=True)
        idata.load()
        with atomic_path(post_path) as tmp:
            idata.to_netcdf(str(tmp))
        findings.insert(0, (
            f"The first fit had {before['n_divergent']} divergent transitions; it was refitted "
            f"once with target acceptance {target:g}, leaving {result.n_divergent}."
        ))
    # warnings of the fit stage (model/within.py: individuals without a species term) come
    # first among the findings, so the page shows them with the checks
    findings[:0] = json.loads(str(idata.attrs.get("warnings") or "[]"))
    extension = chain_extension(idata)
    if _extension_worth_saying(extension, result.verdict):
        findings.insert(0, _extension_finding(extension))
    groups = innermost_groups(config, dataset, idata)
    ppc = predictive_checks(idata, groups=groups)
    findings.extend(ppc_findings(ppc))
    payload = {
        "dataset": dataset,
        "model": model,
        "verdict": result.verdict,
        "diagnostics": result.to_list(),
        "findings": findings,
        "refit": refit,
        "extension": extension,
        "ppc": ppc,
    }
    write_json(paths.check_path(results, dataset, model), _clean_json(payload))
    # the check runs inside the fit job of the workflow; this line is how
    # benchmarks/batch_cost.py tells its seconds from the fit's
    log.info("check %s/%s: %s; check done in %.2f s", dataset, model, result.verdict,
             time.perf_counter() - start)
    return result.verdict


def chain_extension(idata: Any) -> dict[str, Any] | None:
    """The fit stage's chain-extension record (``chain_extension`` attribute), or ``None``.

    ``None`` for fits made before the record existed. See
    :func:`allolaw.model.extending.extend_if_short` for its keys.
    """
    raw = idata.attrs.get("chain_extension")
    if not raw:
        return None
    return json.loads(raw)


def _extension_worth_saying(ext: dict[str, Any] | None, verdict: str) -> bool:
    # "off" records made since the fit stopped computing R-hat and ESS when the extension is
    # off carry no numbers: said only when this check's own diagnostics fall short
    if ext is None or ext.get("status") == "not needed":
        return False
    if ext.get("status") == "off" and ext.get("before") is None:
        return verdict != "pass"
    return True


def _extension_finding(ext: dict[str, Any]) -> str:
    before, after = ext["before"], ext["after"]
    if ext["status"] == "extended":
        return (f"R-hat or ESS fell short after {ext['draws_per_chain_before']} draws per chain "
                f"({ext['reason']}); every chain was run {ext['extra_draws_per_chain']} draws "
                f"further from its last draw{_extension_how(ext)}. Worst "
                f"R-hat {before['rhat']} → {after['rhat']}, smallest bulk ESS "
                f"{before['ess_bulk']} → {after['ess_bulk']}, smallest tail ESS "
                f"{before['ess_tail']} → {after['ess_tail']}.")
    return f"The chains were not extended: {ext['reason']}."


def _extension_how(ext: dict[str, Any]) -> str:
    # records made before the mass_matrix key: the adapted step size and mass matrix
    kind = ext.get("mass_matrix", "adapted diagonal")
    tuning = int(ext.get("step_size_tuning_steps", 0))
    if kind == "adapted diagonal" and not tuning:
        return " with its adapted step size and mass matrix, no new warm-up"
    return (f" with a fixed mass matrix from the fit's draws ({kind}; nutpie's adapted one "
            f"has a low-rank part it does not hand back) and the step size tuned again over "
            f"{tuning} steps, which were thrown away")


def _refit_numbers(result: CheckResult) -> dict[str, Any]:
    return {
        "verdict": result.verdict,
        "n_divergent": result.n_divergent,
        "diagnostics": {d.name: d.value for d in result.diagnostics},
    }


def _clean_json(obj: Any) -> Any:
    """Replace NaN/inf (not JSON) by None, recursively."""
    if isinstance(obj, dict):
        return {k: _clean_json(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean_json(v) for v in obj]
    if isinstance(obj, float | np.floating) and not math.isfinite(float(obj)):
        return None
    if isinstance(obj, np.generic):
        return obj.item()
    return obj
