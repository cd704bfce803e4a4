rule prepare_dataset:
    input:
        sources=dataset_sources,
    output:
        clean=f"{RESULTS}/{{dataset}}/clean.csv",
        ledger=f"{RESULTS}/{{dataset}}/ledger.csv",
        prepared=f"{RESULTS}/{{dataset}}/prepared.json",
    log:
        f"{LOGS}/{{dataset}}/prepare.log",
    benchmark:
        f"{LOGS}/benchmarks/{{dataset}}/prepare.tsv"
    params:
        cli=ALLOLAW,
        opts=CLI_OPTS,
    conda:
        "../envs/allolaw.yaml"
    shell:
        "{params.cli} prepare {params.opts} --dataset {wildcards.dataset} > {log} 2>&1"
