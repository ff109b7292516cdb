# One job: the tidy estimates and the comparison tables, from the batch files only.

rule collate:
    input:
        PLAN.batch_files(),
    output:
        "estimates.csv",
    log:
        "logs/collate.log",
    params:
        code=sf.code_version("collate"),
        study=PLAN.study_digest(),
    shell:
        "{PY:q} -m specflow.workflow collate --spec {SPEC:q} --out-dir . --log {log:q} > {log:q} 2>&1"
