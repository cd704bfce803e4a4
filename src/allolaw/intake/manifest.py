"""The manifest: what a prepared set was made from and what it holds; the readers that check it.

``prepare`` writes ``manifest.json`` last, after ``clean.csv``, ``ledger.csv`` and
``prepared.json``, and removes the old one before writing anything. It records the SHA-256 of
each input file and of the dataset's config section, and of each output. The readers
(:func:`read_clean`, :func:`read_prepared`) refuse a set without a manifest, with an output
that differs from its recorded hash (a run killed half-way, a hand edit), or whose recorded
input files no longer match the files on disk; the message says to rerun ``allolaw prepare``.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from allolaw import __version__
from allolaw.errors import UserError
from allolaw.io import file_sha256, write_json
from allolaw.paths import clean_path, ledger_path, manifest_path, prepared_path, tree_path

__all__ = ["config_section_sha256", "dataset_config_sha256", "read_clean", "read_prepared",
           "verify_manifest", "write_manifest"]

_TEXT_COLUMNS = ("species", "source", "sd_source_size", "sd_source_trait")


def config_section_sha256(ds: dict[str, Any], energy: float) -> str:
    """Hash of what the prepare stage reads from the config for one dataset."""
    text = json.dumps({"dataset": ds, "energy_per_ml_o2_joule": energy}, sort_keys=True,
                      default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def dataset_config_sha256(config: dict[str, Any], dataset: str) -> str:
    """:func:`config_section_sha256` of ``dataset`` in a batch config, as ``prepare`` records it.

    Later stages pass it to :func:`read_clean` / :func:`read_prepared`, so a dataset whose
    config section changed after it was prepared is refused instead of fitted silently.
    """
    from allolaw.config import dataset_config
    from allolaw.intake.units import DEFAULT_ENERGY_PER_ML_O2_JOULE

    energy = float(config.get("energy_per_ml_o2_joule", DEFAULT_ENERGY_PER_ML_O2_JOULE))
    return config_section_sha256(dataset_config(config, dataset), energy)


def write_manifest(results_dir: str | Path, dataset: str, *, inputs: list[dict[str, str]],
                   config_sha256: str | None) -> None:
    """Write ``manifest.json`` for the outputs now on disk (those that exist).

    Parameters
    ----------
    inputs
        ``{"file": path as in the config, "sha256": hash}`` per source file.
    config_sha256
        :func:`config_section_sha256` of the dataset, or ``None`` when not known.
    """
    outputs = {path.name: file_sha256(path) for path in _outputs(results_dir, dataset)
               if path.is_file()}
    manifest = {
        "dataset": dataset,
        "allolaw_version": __version__,
        "inputs": {"files": inputs, "config_sha256": config_sha256},
        "outputs": outputs,
    }
    write_json(manifest_path(results_dir, dataset), manifest)


def verify_manifest(results_dir: str | Path, dataset: str, *,
                    config_sha256: str | None = None) -> dict[str, Any]:
    """Check a prepared set against its manifest; return the manifest.

    Raises
    ------
    UserError
        No manifest, an output missing or changed, an input file missing or changed, or (when
        ``config_sha256`` is given) a changed config section.
    """
    rerun = f"rerun `allolaw prepare --dataset {dataset}`"
    path = manifest_path(results_dir, dataset)
    if not path.is_file():
        what = "not prepared" if not prepared_path(results_dir, dataset).is_file() else (
            "the last `allolaw prepare` did not finish (no manifest.json)")
        msg = f"{path.parent}: dataset '{dataset}' is {what}: {rerun}"
        if what == "not prepared":
            msg = f"{prepared_path(results_dir, dataset)} not found: {rerun} first"
        raise UserError(msg)
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
        recorded = dict(manifest["outputs"])
        inputs = list(manifest["inputs"]["files"])
    except (ValueError, KeyError, TypeError) as err:
        msg = f"{path}: unreadable manifest ({err}): {rerun}"
        raise UserError(msg) from None
    for output in _outputs(results_dir, dataset):
        if output.name not in recorded and output.name in ("ledger.csv", "tree.nwk"):
            continue  # a set written by hand (tests) may lack the ledger; a tree is optional
        if not output.is_file() or file_sha256(output) != recorded.get(output.name):
            msg = (
                f"{output}: differs from the prepared set recorded in {path.name} (a prepare "
                f"run stopped half-way, or the file was edited): {rerun}"
            )
            raise UserError(msg)
    for item in inputs:
        source = Path(item["file"])
        if not source.is_file() or file_sha256(source) != item["sha256"]:
            state = "is missing" if not source.is_file() else "has changed"
            msg = (f"{source}: the input file {state} since dataset '{dataset}' was prepared: "
                   f"{rerun}")
            raise UserError(msg)
    recorded_config = manifest["inputs"].get("config_sha256")
    # a set written without a config (by hand, in tests) records None: nothing to compare
    if config_sha256 is not None and recorded_config is not None \
            and recorded_config != config_sha256:
        msg = f"the config of dataset '{dataset}' has changed since it was prepared: {rerun}"
        raise UserError(msg)
    return manifest


def read_prepared(results_dir: str | Path, dataset: str, *,
                  config_sha256: str | None = None) -> dict[str, Any]:
    """Read ``prepared.json`` of a prepared dataset, after checking its manifest.

    Raises
    ------
    UserError
        If the dataset has not been prepared, or its set fails :func:`verify_manifest`.
    """
    verify_manifest(results_dir, dataset, config_sha256=config_sha256)
    path = prepared_path(results_dir, dataset)
    return json.loads(path.read_text(encoding="utf-8"))


def read_clean(results_dir: str | Path, dataset: str, *,
               config_sha256: str | None = None) -> pd.DataFrame:
    """Read ``clean.csv`` of a prepared dataset (taxon and species columns as text).

    Raises
    ------
    UserError
        If the dataset has not been prepared, or its set fails :func:`verify_manifest`.
    """
    prepared = read_prepared(results_dir, dataset, config_sha256=config_sha256)
    path = clean_path(results_dir, dataset)
    text = {*_TEXT_COLUMNS, *prepared.get("levels", [])}
    frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    for name in frame.columns:
        if name in text:
            continue
        if name.startswith("flag_"):
            frame[name] = frame[name].map({"True": True, "False": False}).astype(bool)
        elif name == "n_rows":
            frame[name] = frame[name].astype(int)
        else:
            frame[name] = pd.to_numeric(frame[name].replace("", np.nan)).astype(float)
    return frame


def _outputs(results_dir: str | Path, dataset: str) -> list[Path]:
    return [clean_path(results_dir, dataset), ledger_path(results_dir, dataset),
            prepared_path(results_dir, dataset), tree_path(results_dir, dataset)]


