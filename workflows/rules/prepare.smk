# One job a dataset: read, derive, filter, type-check; written as Parquet.
# Its input is the fingerprint file (rewritten only when the data's content changes).

rule prepare:
    input:
        fingerprint="data/{dataset}.fingerprint",
    output:
        "data/{dataset}.parquet",
    log:
        "logs/prepare/{dataset}.log",
    params:
        code=sf.code_version("prepare"),
    wildcard_constraints:
        dataset=PLAN.pattern(PLAN.datasets),
    threads: 1
    resources:
        mem_mb=4000,
        runtime=60,
    shell:
        "{PY:q} -m specflow.workflow prepare --spec {SPEC:q} --dataset {wildcards.dataset:q} "
        "--fingerprint {input.fingerprint:q} --out {output:q} --log {log:q} > {log:q} 2>&1"
