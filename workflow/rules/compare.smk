# One job per dataset compares its models, weighs the named exponents and writes the HTML report
# (`allolaw compare --report`): one process start-up of the scientific stack instead of two.
# `allolaw report` still writes the page alone, by hand.
rule compare_models:
    input:
        clean=f"{RESULTS}/{{dataset}}/clean.csv",
        ledger=f"{RESULTS}/{{dataset}}/ledger.csv",
        prepared=f"{RESULTS}/{{dataset}}/prepared.json",
        manifest=f"{RESULTS}/{{dataset}}/manifest.json",
        posteriors=dataset_posteriors,
        checks=dataset_checks,
    output:
        comparison=f"{RESULTS}/{{dataset}}/comparison.csv",
        hypotheses=f"{RESULTS}/{{dataset}}/hypotheses.csv",
        curvature=f"{RESULTS}/{{dataset}}/curvature_audit.json",
        breakpoint=f"{RESULTS}/{{dataset}}/breakpoint.json",
        headline=f"{RESULTS}/{{dataset}}/headline.json",
        html=f"{REPORTS}/{{dataset}}.html",
    log:
        f"{LOGS}/{{dataset}}/compare.log",
    benchmark:
        f"{LOGS}/benchmarks/{{dataset}}/compare.tsv"
    params:
        cli=ALLOLAW,
        opts=CLI_OPTS,
    conda:
        "../envs/allolaw.yaml"
    shell:
        "{params.cli} compare {params.opts} --dataset {wildcards.dataset} --report > {log} 2>&1"
