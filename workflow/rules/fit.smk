rule fit_model:
    input:
        clean=f"{RESULTS}/{{dataset}}/clean.csv",
        prepared=f"{RESULTS}/{{dataset}}/prepared.json",
        spec=model_spec,
    output:
        posterior=f"{RESULTS}/{{dataset}}/{{model}}/posterior.nc",
    log:
        f"{LOGS}/{{dataset}}/fit_{{model}}.log",
    benchmark:
        f"{LOGS}/benchmarks/{{dataset}}/fit_{{model}}.tsv"
    threads: 1
    resources:
        mem_mb=4000,
        runtime=60,
    params:
        cli=ALLOLAW,
        opts=CLI_OPTS,
    conda:
        "../envs/allolaw.yaml"
    shell:
        "{params.cli} fit {params.opts} --dataset {wildcards.dataset} --model {wildcards.model}"
        " --threads {threads} > {log} 2>&1"
