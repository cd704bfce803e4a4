# One job fits a model and checks the fit (`allolaw fit --check`): the check reads the
# posterior, may refit once on divergences (rewriting posterior.nc before the job ends) and
# writes the check JSON. One process instead of two saves a start-up of the scientific stack
# per model; `allolaw check` still runs the check alone, by hand.
rule fit_model:
    input:
        clean=f"{RESULTS}/{{dataset}}/clean.csv",
        prepared=f"{RESULTS}/{{dataset}}/prepared.json",
        manifest=f"{RESULTS}/{{dataset}}/manifest.json",
        spec=model_spec,
    output:
        posterior=f"{RESULTS}/{{dataset}}/{{model}}/posterior.nc",
        check=f"{RESULTS}/{{dataset}}/checks/{{model}}.json",
    log:
        f"{LOGS}/{{dataset}}/fit_{{model}}.log",
    benchmark:
        f"{LOGS}/benchmarks/{{dataset}}/fit_{{model}}.tsv"
    threads: 1
    priority: fit_priority
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
        " --threads {threads} --check > {log} 2>&1"
