"""The command line: every stage has --help; user errors exit 2 without a traceback; the log
keeps library chatter out."""

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


def _log_of_arviz_import(debug: bool) -> str:
    # a fresh process: ArviZ logs its "arviz_* not installed" lines when first imported
    code = ("from allolaw.cli import configure_logging; "
            f"configure_logging(debug={debug}); "
            "import logging; logging.getLogger('allolaw.model.fitting').info('fit: ours'); "
            "import arviz")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    return out.stderr


def test_library_info_lines_stay_out_of_the_log_and_show_with_debug():
    quiet = _log_of_arviz_import(debug=False)
    assert "allolaw INFO fit: ours" in quiet
    assert "not installed" not in quiet
    loud = _log_of_arviz_import(debug=True)
    assert "allolaw INFO fit: ours" in loud
    assert "allolaw DEBUG arviz_base not installed" in loud
    assert "allolaw DEBUG arviz_stats not installed" in loud
    assert "allolaw DEBUG arviz_plots not installed" in loud


def test_library_warnings_are_kept_in_the_log():
    code = ("from allolaw.cli import configure_logging; configure_logging(); "
            "import logging; logging.getLogger('pymc').warning('a library warning'); "
            "logging.getLogger('pymc').info('Sampling: [trait]')")
    err = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stderr
    assert "allolaw WARNING a library warning" in err
    assert "Sampling" not in err
