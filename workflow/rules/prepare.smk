# Before any fit (fits carry priority = their spec's cost rank, at most ~10): a prepare job
# takes seconds and unlocks all fits of its dataset, so the longest-first order sees them all.
rule prepare_dataset:
    input:
        sources=dataset_sources,
    priority: 100
    output:
        clean=f"{RESULTS}/{{dataset}}/clean.csv",
        ledger=f"{RESULTS}/{{dataset}}/ledger.csv",
        prepared=f"{RESULTS}/{{dataset}}/prepared.json",
        manifest=f"{RESULTS}/{{dataset}}/manifest.json",
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
