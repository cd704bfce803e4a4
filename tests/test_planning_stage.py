"""The plan stage from the command line: files, page, and errors the user can fix."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import yaml

from allolaw.cli import main

ROOT = Path(__file__).resolve().parents[1]


def _plan_config(tmp_path: Path) -> list[str]:
    plans = {
        "results_dir": str(tmp_path / "results"), "reports_dir": str(tmp_path / "reports"),
        "plans": {"tiny": {
            "title": "Tiny plan (invented truth)",
            "truth": {"exponent": 0.75, "intercept_sd": 0.3, "exponent_sd": 0.05,
                      "scatter_sd": 0.2},
            "designs": {"species": [16, 48], "taxa": [4], "size_range": [2.0],
                        "size_error_sd": [0.5]},
            "simulations": 20, "seed": 5, "chunks": 2}},
    }
    path = tmp_path / "plans.yaml"
    path.write_text(yaml.safe_dump(plans))
    return ["--config", str(ROOT / "config" / "config.yaml"), "--config", str(path)]


def test_plan_command_writes_tables_and_a_page_with_assumptions_and_cautions(tmp_path: Path
                                                                            ) -> None:
    cfg = _plan_config(tmp_path)
    assert main(["plan", *cfg, "--plan", "tiny"]) == 0
    designs = pd.read_csv(tmp_path / "results/plans/tiny/designs.csv")
    assert list(designs["species"]) == [16, 48]
    assert {"assurance_se", "confident_wrong_se", "width90_se"} <= set(designs.columns)
    page = (tmp_path / "reports/plan_tiny.html").read_text()
    for text in ('id="table-designs"', "<svg", "What is assumed", "regulatory guidance",
                 "reliability below"):  # size error 0.5 on sizes of SD 0.5: reliability 0.5
        assert text in page


def test_chunked_command_run_gives_the_same_designs_table(tmp_path: Path) -> None:
    cfg = _plan_config(tmp_path)
    assert main(["plan", *cfg, "--plan", "tiny"]) == 0
    whole = pd.read_csv(tmp_path / "results/plans/tiny/designs.csv")
    for k in (1, 2):
        assert main(["plan", *cfg, "--plan", "tiny", "--chunk", f"{k}/2"]) == 0
    assert main(["plan", *cfg, "--plan", "tiny", "--combine"]) == 0
    pd.testing.assert_frame_equal(whole, pd.read_csv(tmp_path / "results/plans/tiny/designs.csv"),
                                  check_exact=True)


def test_bad_chunk_and_missing_chunk_file_exit_2_with_a_message(tmp_path: Path, capsys) -> None:
    cfg = _plan_config(tmp_path)
    assert main(["plan", *cfg, "--plan", "tiny", "--chunk", "3/2"]) == 2
    assert "k must lie between 1 and K" in capsys.readouterr().err
    assert main(["plan", *cfg, "--plan", "tiny", "--combine"]) == 2
    assert "chunk_1_of_2.csv" in capsys.readouterr().err
    assert main(["plan", *cfg, "--plan", "nope"]) == 2
    assert "no plan named 'nope'" in capsys.readouterr().err
