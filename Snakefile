# allolaw: prepare -> fit (and check) -> compare (and report) -> index. This file is an index only.
from snakemake.utils import min_version, validate

min_version("9.0")


configfile: "config/config.yaml"


validate(config, "config/schema.yaml")


include: "workflow/rules/common.smk"
include: "workflow/rules/prepare.smk"
include: "workflow/rules/fit.smk"
include: "workflow/rules/compare.smk"
include: "workflow/rules/report.smk"
include: "workflow/rules/plan.smk"


rule all:
    input:
        all_reports(),
    default_target: True
