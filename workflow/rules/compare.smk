rule compare_models:
    input:
        posteriors=dataset_posteriors,
        checks=dataset_checks,
    output:
        comparison=f"{RESULTS}/{{dataset}}/comparison.csv",
        hypotheses=f"{RESULTS}/{{dataset}}/hypotheses.csv",
        curvature=f"{RESULTS}/{{dataset}}/curvature_audit.json",
        breakpoint=f"{RESULTS}/{{dataset}}/breakpoint.json",
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
        "{params.cli} compare {params.opts} --dataset {wildcards.dataset} > {log} 2>&1"
