"""The rule files write where allolaw.paths says each stage writes."""

import re
from pathlib import Path

from allolaw import paths

REPO = Path(__file__).resolve().parents[1]


def _rule_outputs() -> set[str]:
    text = "".join(p.read_text() for p in (REPO / "workflow" / "rules").glob("*.smk"))
    found = re.findall(r'f"\{(RESULTS|REPORTS)\}/([^"]+)"', text)
    return {f"{root}/{rest}".replace("{{", "{").replace("}}", "}") for root, rest in found}


def test_rule_paths_match_the_package_layout():
    expected = {
        str(paths.clean_path("RESULTS", "{dataset}")),
        str(paths.ledger_path("RESULTS", "{dataset}")),
        str(paths.prepared_path("RESULTS", "{dataset}")),
        str(paths.manifest_path("RESULTS", "{dataset}")),
        str(paths.posterior_path("RESULTS", "{dataset}", "{model}")),
        str(paths.check_path("RESULTS", "{dataset}", "{model}")),
        str(paths.comparison_path("RESULTS", "{dataset}")),
        str(paths.hypotheses_path("RESULTS", "{dataset}")),
        str(paths.curvature_audit_path("RESULTS", "{dataset}")),
        str(paths.breakpoint_path("RESULTS", "{dataset}")),
        str(paths.report_path("REPORTS", "{dataset}")),
    }
    assert expected <= _rule_outputs()
