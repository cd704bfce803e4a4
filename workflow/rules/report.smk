rule render_report:
    input:
        clean=f"{RESULTS}/{{dataset}}/clean.csv",
        ledger=f"{RESULTS}/{{dataset}}/ledger.csv",
        prepared=f"{RESULTS}/{{dataset}}/prepared.json",
        posteriors=dataset_posteriors,
        checks=dataset_checks,
        comparison=f"{RESULTS}/{{dataset}}/comparison.csv",
        hypotheses=f"{RESULTS}/{{dataset}}/hypotheses.csv",
        curvature=f"{RESULTS}/{{dataset}}/curvature_audit.json",
        breakpoint=f"{RESULTS}/{{dataset}}/breakpoint.json",
    output:
        html=f"{REPORTS}/{{dataset}}.html",
    log:
        f"{LOGS}/{{dataset}}/report.log",
    benchmark:
        f"{LOGS}/benchmarks/{{dataset}}/report.tsv"
    params:
        cli=ALLOLAW,
        opts=CLI_OPTS,
    conda:
        "../envs/allolaw.yaml"
    shell:
        "{params.cli} report {params.opts} --dataset {wildcards.dataset} > {log} 2>&1"


rule render_index:
    input:
        reports=[f"{REPORTS}/{d}.html" for d in DATASETS],
    output:
        html=f"{REPORTS}/index.html",
    log:
        f"{LOGS}/index.log",
    benchmark:
        f"{LOGS}/benchmarks/index.tsv"
    params:
        cli=ALLOLAW,
        opts=CLI_OPTS,
    conda:
        "../envs/allolaw.yaml"
    shell:
        "{params.cli} report {params.opts} --index > {log} 2>&1"
