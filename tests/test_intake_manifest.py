"""The prepared set is all or nothing: killed runs, failed reruns and edits are refused.

``allolaw prepare`` is killed with SIGKILL at each point between the renames of its outputs
(through the test-only environment variable ``ALLOLAW_TEST_KILL_AFTER_RENAME``), in a
subprocess; the reader of the next stage must then refuse the set or read the complete new one.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from allolaw.cli import main
from allolaw.errors import UserError
from allolaw.intake import read_clean, read_prepared
from allolaw.intake.manifest import config_section_sha256
from allolaw.intake.prepare import KILL_HOOK
from allolaw.paths import clean_path, manifest_path

ROOT = Path(__file__).resolve().parents[1]
OLD = """species,family,mass,rate
Sorex alpha,Soricidae,10,0.1
Sorex beta,Soricidae,5,0.05
Mus gamma,Muridae,30,0.3
"""
NEW = OLD + "Mus delta,Muridae,40,0.35\nMus eps,Muridae,45,0.4\n"
RERUN = "rerun `allolaw prepare --dataset d`"


def _setup(tmp_path: Path, text: str = OLD) -> Path:
    (tmp_path / "t.csv").write_text(text, encoding="utf-8")
    config = {"results_dir": str(tmp_path / "results"), "datasets": {"d": {
        "sources": [{"file": str(tmp_path / "t.csv"),
                     "columns": {"species": "species", "size": "mass", "trait": "rate",
                                 "levels": ["family"]},
                     "units": {"size": "g", "trait": "W"}}],
        "size": {"quantity": "mass", "unit": "g"},
        "trait": {"quantity": "power", "unit": "W"},
        "models": ["pooled"]}}}
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(config), encoding="utf-8")
    return path


def _prepare_in_subprocess(config: Path, kill_at: int) -> int:
    env = {**os.environ, "PYTHONPATH": str(ROOT / "src"), KILL_HOOK: str(kill_at)}
    done = subprocess.run(
        [sys.executable, "-m", "allolaw", "prepare", "--config", str(config), "--dataset", "d"],
        env=env, capture_output=True, text=True, timeout=300, check=False,
    )
    return done.returncode


@pytest.mark.parametrize("kill_at", [0, 1, 2, 3, 4])
def test_kill_between_renames_leaves_no_readable_mix(tmp_path, kill_at):
    config = _setup(tmp_path)
    assert main(["prepare", "--config", str(config), "--dataset", "d"]) == 0
    assert len(read_clean(tmp_path / "results", "d")) == 3  # the old complete set
    (tmp_path / "t.csv").write_text(NEW, encoding="utf-8")
    assert _prepare_in_subprocess(config, kill_at) == -signal.SIGKILL
    if kill_at < 4:  # killed before the new manifest: refused, whatever files were renamed
        with pytest.raises(UserError, match="rerun `allolaw prepare"):
            read_clean(tmp_path / "results", "d")
        with pytest.raises(UserError, match="rerun `allolaw prepare"):
            read_prepared(tmp_path / "results", "d")
    else:  # killed after the last rename: the new complete set
        assert len(read_clean(tmp_path / "results", "d")) == 5
        assert read_prepared(tmp_path / "results", "d")["counts"]["input"] == 5


def test_kill_with_unchanged_inputs_is_refused_until_a_full_run(tmp_path):
    config = _setup(tmp_path)
    assert main(["prepare", "--config", str(config), "--dataset", "d"]) == 0
    assert _prepare_in_subprocess(config, 2) == -signal.SIGKILL
    with pytest.raises(UserError, match="did not finish"):
        read_clean(tmp_path / "results", "d")
    assert main(["prepare", "--config", str(config), "--dataset", "d"]) == 0
    assert len(read_clean(tmp_path / "results", "d")) == 3


def test_failed_rerun_leaves_a_set_that_later_stages_refuse(tmp_path, capsys):
    config = _setup(tmp_path)
    assert main(["prepare", "--config", str(config), "--dataset", "d"]) == 0
    (tmp_path / "t.csv").write_text(OLD.replace("rate", "rmr"), encoding="utf-8")
    assert main(["prepare", "--config", str(config), "--dataset", "d"]) == 2
    assert clean_path(tmp_path / "results", "d").is_file()  # old outputs still there …
    assert not manifest_path(tmp_path / "results", "d").exists()  # … but not vouched for
    with pytest.raises(UserError, match="did not finish"):
        read_clean(tmp_path / "results", "d")
    assert "Traceback" not in capsys.readouterr().err


def test_changed_input_file_after_prepare_is_refused(tmp_path):
    config = _setup(tmp_path)
    assert main(["prepare", "--config", str(config), "--dataset", "d"]) == 0
    (tmp_path / "t.csv").write_text(NEW, encoding="utf-8")
    with pytest.raises(UserError, match=r"t\.csv: the input file has changed"):
        read_clean(tmp_path / "results", "d")


def test_edited_output_is_refused(tmp_path):
    config = _setup(tmp_path)
    assert main(["prepare", "--config", str(config), "--dataset", "d"]) == 0
    path = clean_path(tmp_path / "results", "d")
    path.write_text(path.read_text(encoding="utf-8") + "\n", encoding="utf-8")
    with pytest.raises(UserError, match=r"clean\.csv: differs from the prepared set"):
        read_clean(tmp_path / "results", "d")


def test_changed_config_section_is_refused_when_the_reader_is_given_it(tmp_path):
    config = _setup(tmp_path)
    assert main(["prepare", "--config", str(config), "--dataset", "d"]) == 0
    raw = yaml.safe_load(config.read_text(encoding="utf-8"))
    from allolaw.config import validate_config

    ds = validate_config(raw)["datasets"]["d"]
    read_clean(tmp_path / "results", "d", config_sha256=config_section_sha256(ds, 20.1))
    ds["sources"][0]["units"]["size"] = "kg"
    with pytest.raises(UserError, match="config of dataset 'd' has changed"):
        read_clean(tmp_path / "results", "d", config_sha256=config_section_sha256(ds, 20.1))


def test_later_stages_refuse_or_flag_a_prepared_set_whose_config_or_files_changed(tmp_path):
    # fit reads through read_clean/read_prepared with the config section's hash; compare reads
    # prepared.json through the same check; the report renders but shows the mismatch
    from allolaw.answers.dataset import compare_dataset
    from allolaw.config import load_config
    from allolaw.intake.manifest import dataset_config_sha256
    from allolaw.report.summary import summarise_dataset

    config_path = _setup(tmp_path)
    assert main(["prepare", "--config", str(config_path), "--dataset", "d"]) == 0
    config = load_config(config_path)
    results = tmp_path / "results"
    good = dataset_config_sha256(config, "d")
    assert len(read_clean(results, "d", config_sha256=good)) == 3
    context = summarise_dataset(config, "d")
    assert context["data"]["manifest_problem"] is None

    edited = load_config(config_path)
    edited["datasets"]["d"]["size"]["unit"] = "kg"  # the config changed after prepare
    with pytest.raises(UserError, match="config of dataset 'd' has changed"):
        read_clean(results, "d", config_sha256=dataset_config_sha256(edited, "d"))
    with pytest.raises(UserError, match="config of dataset 'd' has changed"):
        compare_dataset(edited, "d")
    assert "has changed" in summarise_dataset(edited, "d")["data"]["manifest_problem"]

    (tmp_path / "t.csv").write_text(NEW, encoding="utf-8")  # the input changed after prepare
    with pytest.raises(UserError, match="input file has changed"):
        compare_dataset(config, "d")


def test_intake_warnings_reach_the_report_page(tmp_path):
    from allolaw.config import load_config
    from allolaw.report.rendering import render_dataset_report

    config_path = _setup(tmp_path, OLD + "=Mus risky,Muridae,20,0.2\n")
    assert main(["prepare", "--config", str(config_path), "--dataset", "d"]) == 0
    config = load_config(config_path)
    config["reports_dir"] = str(tmp_path / "reports")
    warnings = read_prepared(tmp_path / "results", "d")["warnings"]
    assert warnings  # a cell a spreadsheet would run as a formula is neutralised, with a warning
    page = render_dataset_report(config, "d").read_text(encoding="utf-8")
    assert 'id="intake-warnings"' in page
    assert f"Warnings from reading the files ({len(warnings)})" in page
    assert 'id="manifest-problem"' not in page
