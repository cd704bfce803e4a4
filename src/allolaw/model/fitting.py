"""The ``fit`` stage: one model spec fitted to one prepared dataset, written with provenance.

:func:`fit_dataset_model` reads a prepared dataset and a model spec, fits
(:func:`allolaw.model.sampling.fit_model`), records how the fit was made and writes
``results/<dataset>/<model>/posterior.nc`` atomically.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

from allolaw import __version__
from allolaw.errors import UserError
from allolaw.io import atomic_path, file_sha256
from allolaw.paths import clean_path, posterior_path, prepared_path

if TYPE_CHECKING:
    import arviz as az
from allolaw.model.sampling import fit_model

__all__ = ["derive_seed", "fit_dataset_model"]

log = logging.getLogger(__name__)

_VERSION_PACKAGES = (
    "pymc",
    "pytensor",
    "arviz",
    "numpy",
    "jax",
    "jaxlib",
    "numpyro",
    "nutpie",
    "xarray",
    "h5netcdf",
)


def fit_dataset_model(
    config: dict[str, Any],
    dataset: str,
    model_name: str,
    *,
    threads: int = 1,
    target_acceptance: float | None = None,
) -> az.InferenceData:
    """Fit one model spec to one prepared dataset and write its ``posterior.nc``.

    Parameters
    ----------
    config
        The validated batch config (:func:`allolaw.config.load_config`).
    dataset
        Dataset name; ``results/<dataset>/clean.csv`` and ``prepared.json`` must exist.
    model_name
        Model spec name (``models/<name>.yaml``).
    threads
        Cores for the job.
    target_acceptance
        Overrides ``sampler.target_acceptance`` (the check stage's refit after divergences).

    Returns
    -------
    arviz.InferenceData
        The fit, with the attributes listed in DEVELOPERS.md.

    Raises
    ------
    UserError
        If the prepared files are missing or lack a needed entry.
    """
    from allolaw.model.builder import build_model
    from allolaw.model.spec import load_spec
    from allolaw.model.within import species_grouping_warning

    wall_start = time.perf_counter()
    results = Path(config["results_dir"])
    clean_file = clean_path(results, dataset)
    from allolaw.intake import read_clean, read_prepared
    from allolaw.intake.manifest import dataset_config_sha256

    config_hash = dataset_config_sha256(config, dataset)
    data = read_clean(results, dataset, config_sha256=config_hash)
    prepared = read_prepared(results, dataset, config_sha256=config_hash)
    levels = _levels(config, dataset, prepared)
    log_reference_size = _log_reference_size(prepared, prepared_path(results, dataset))
    spec = load_spec(config["models_dir"], model_name)
    sampler = dict(config["sampler"])
    if target_acceptance is not None:
        sampler["target_acceptance"] = float(target_acceptance)
    seed = derive_seed(int(sampler["seed"]), dataset, model_name)

    warnings = [w for w in [species_grouping_warning(
        spec, levels=levels, rows_are=str(prepared.get("rows_are", "species_values")))] if w]
    for warning in warnings:  # also in the fit's attributes, for the check findings
        log.warning("%s/%s: %s", dataset, model_name, warning)
    log.info("fit %s/%s: building the model (%d species)", dataset, model_name, len(data))
    phylogeny = _phylogeny(results, dataset, prepared, data) if (
        spec.shared_ancestry != "none") else None
    model = build_model(data, spec, levels=levels, log_reference_size=log_reference_size,
                        phylogeny=phylogeny)
    prior_model = build_model(data, spec, levels=levels, log_reference_size=log_reference_size,
                              prior_only=True, phylogeny=phylogeny)
    idata = fit_model(
        model,
        chains=int(sampler["chains"]),
        draws=int(sampler["draws"]),
        warmup=int(sampler["warmup"]),
        target_acceptance=float(sampler["target_acceptance"]),
        seed=seed,
        backend=str(sampler.get("backend", "auto")),
        threads=threads,
        prior_draws=int(sampler.get("prior_draws", 500)),
        prior_model=prior_model,
        extension_draws=int(sampler.get("extension_draws", 0)),
    )
    idata.attrs.update(
        {
            "allolaw_version": __version__,
            "dataset": dataset,
            "model": model_name,
            "spec": json.dumps(spec.to_dict(), sort_keys=True, default=str),
            "sampler": json.dumps(sampler, sort_keys=True),
            "data_sha256": file_sha256(clean_file),
            "versions": json.dumps(_versions(), sort_keys=True),
            "log_reference_size": float(log_reference_size),
            "tree_sha256": (prepared.get("tree") or {}).get("sha256", "") if phylogeny else "",
            "refit": json.dumps(target_acceptance is not None),
            "wall_seconds": round(time.perf_counter() - wall_start, 3),
            "warnings": json.dumps(warnings),
        }
    )
    out = posterior_path(results, dataset, model_name)
    with atomic_path(out) as tmp:
        idata.to_netcdf(str(tmp), engine="h5netcdf")
    log.info("fit %s/%s: wrote %s", dataset, model_name, out)
    return idata


def derive_seed(base: int, dataset: str, model: str) -> int:
    """Return a seed in ``[0, 2**32)`` fixed by ``base``, ``dataset`` and ``model``.

    Built from SHA-256 (stable across processes and machines, unlike Python's ``hash``).
    """
    digest = hashlib.sha256(f"{int(base)}\x1f{dataset}\x1f{model}".encode()).digest()
    return int.from_bytes(digest[:4], "little")


def _levels(config: dict[str, Any], dataset: str, prepared: dict[str, Any]) -> list[str]:
    for key in ("levels", "taxon_levels"):
        if isinstance(prepared.get(key), list):
            return [str(level) for level in prepared[key]]
    sources = config["datasets"][dataset].get("sources", [])
    return list(sources[0].get("columns", {}).get("levels", [])) if sources else []


def _phylogeny(results: Path, dataset: str, prepared: dict[str, Any], data: Any) -> Any:
    # the pruned tree prepare wrote (results/<d>/tree.nwk), species in clean.csv order
    from allolaw.model.phylo_terms import load_phylogeny
    from allolaw.paths import tree_path

    if not prepared.get("tree"):
        msg = (f"dataset '{dataset}' has no tree: a model with shared_ancestry needs `tree:` "
               "in the dataset's config; rerun `allolaw prepare`")
        raise UserError(msg)
    return load_phylogeny(tree_path(results, dataset), data["species"].tolist())


def _log_reference_size(prepared: dict[str, Any], path: Path) -> float:
    value = prepared.get("log_reference_size")
    if value is None and isinstance(prepared.get("reference_size"), dict):
        value = prepared["reference_size"].get("log")
    if value is None:
        msg = f"{path}: no 'log_reference_size' entry; rerun `allolaw prepare`"
        raise UserError(msg)
    return float(value)




def _versions() -> dict[str, str]:
    versions = {}
    for name in _VERSION_PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions
