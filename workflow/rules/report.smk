# The page of each dataset is written by the compare job (compare.smk); this rule writes the
# batch index from them.
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
