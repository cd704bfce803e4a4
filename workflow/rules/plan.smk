# Study plans (`plans:` in the config): each plan's simulations run as `chunks` jobs, then one
# job combines them and writes the plan page. Not part of `rule all`; ask for `plan_all`:
#   snakemake --cores 2 --configfile config/plans.yaml plan_all
PLANS = CONFIG.get("plans", {}) or {}


rule plan_all:
    input:
        [f"{REPORTS}/plan_{name}.html" for name in PLANS],


rule simulate_plan_chunk:
    output:
        f"{RESULTS}/plans/{{plan}}/chunk_{{k}}_of_{{n}}.csv",
    log:
        f"{LOGS}/plans/{{plan}}/chunk_{{k}}_of_{{n}}.log",
    benchmark:
        f"{LOGS}/benchmarks/plans/{{plan}}/chunk_{{k}}_of_{{n}}.tsv"
    wildcard_constraints:
        k=r"\d+",
        n=r"\d+",
    params:
        cli=ALLOLAW,
        opts=CLI_OPTS,
    conda:
        "../envs/allolaw.yaml"
    shell:
        "{params.cli} plan {params.opts} --plan {wildcards.plan} --chunk {wildcards.k}/{wildcards.n} > {log} 2>&1"


rule combine_plan:
    input:
        lambda wc: [
            f"{RESULTS}/plans/{wc.plan}/chunk_{k}_of_{PLANS[wc.plan].get('chunks', 1)}.csv"
            for k in range(1, int(PLANS[wc.plan].get("chunks", 1)) + 1)
        ],
    output:
        designs=f"{RESULTS}/plans/{{plan}}/designs.csv",
        html=f"{REPORTS}/plan_{{plan}}.html",
    log:
        f"{LOGS}/plans/{{plan}}/combine.log",
    benchmark:
        f"{LOGS}/benchmarks/plans/{{plan}}/combine.tsv"
    params:
        cli=ALLOLAW,
        opts=CLI_OPTS,
    conda:
        "../envs/allolaw.yaml"
    shell:
        "{params.cli} plan {params.opts} --plan {wildcards.plan} --combine > {log} 2>&1"
