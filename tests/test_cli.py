"""The command line: every stage has --help; user errors exit 2 without a traceback."""

import subprocess
import sys

import pytest

from allolaw.cli import main

STAGES = ["prepare", "fit", "check", "compare", "report", "demo-data"]


@pytest.mark.parametrize("stage", STAGES)
def test_every_stage_has_help(stage, capsys):
    with pytest.raises(SystemExit) as exit_info:
        main([stage, "--help"])
    assert exit_info.value.code == 0
    assert "usage: allolaw" in capsys.readouterr().out


def test_bad_config_key_exits_2_with_one_message(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("datasets: {}\nunknown_key: 1\n")
    result = subprocess.run(
        [sys.executable, "-m", "allolaw", "prepare", "--config", str(bad), "--dataset", "x"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert result.returncode == 2
    assert "Traceback" not in result.stderr
    assert "allolaw prepare: error:" in result.stderr
    assert "unknown_key" in result.stderr or "datasets" in result.stderr


def test_unknown_dataset_names_the_known_ones(capsys):
    code = main(["prepare", "--dataset", "no_such_dataset"])
    assert code == 2
    err = capsys.readouterr().err
    assert "no_such_dataset" in err
    assert "island_metabolism" in err
