# The check may refit once (divergences) and then rewrites posterior.nc in place, so the
# posterior is an input here and the check JSON records what happened.
rule check_fit:
    input:
        posterior=f"{RESULTS}/{{dataset}}/{{model}}/posterior.nc",
    output:
        check=f"{RESULTS}/{{dataset}}/checks/{{model}}.json",
    log:
        f"{LOGS}/{{dataset}}/check_{{model}}.log",
    benchmark:
        f"{LOGS}/benchmarks/{{dataset}}/check_{{model}}.tsv"
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
        "{params.cli} check {params.opts} --dataset {wildcards.dataset} --model {wildcards.model}"
        " --threads {threads} > {log} 2>&1"
