# One job a batch of specifications sharing a dataset; one JSON of FitResults per batch.
# params carry the members (ids and labels) and the fitting code's hash, so a batch reruns
# exactly when one of them changes.

rule fit:
    input:
        data=lambda wc: f"data/{PLAN.dataset_of(wc.batch)}.parquet",
        fingerprint=lambda wc: f"data/{PLAN.dataset_of(wc.batch)}.fingerprint",
    output:
        "fits/{batch}.json",
    log:
        "logs/fit/{batch}.log",
    params:
        members=lambda wc: PLAN.members(wc.batch),
        digest=lambda wc: PLAN.members_digest(wc.batch),
        code=sf.code_version("fit"),
    wildcard_constraints:
        batch=PLAN.pattern(PLAN.batches),
    threads: 1
    resources:
        mem_mb=4000,
        runtime=120,
    shell:
        "{PY:q} -m specflow.workflow fit --spec {SPEC:q} --batch {wildcards.batch:q} "
        "--members {params.digest} --data {input.data:q} --fingerprint {input.fingerprint:q} "
        "--out {output:q} --reuse {REUSE} --log {log:q} > {log:q} 2>&1"
