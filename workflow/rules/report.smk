# Everything here reads the store only.
rule report:
    input:
        store=STORE,
        templates=sorted(str(p) for p in bundled.REPORT_TEMPLATES.rglob("*") if p.suffix in (".j2", ".css")),
    output:
        html=REPORT_HTML,
        csv=PERFORMANCE_CSV,
        checks=CHECKS_CSV,
    log:
        str(LAYOUT.stage_log("report")),
    params:
        python=PYTHON,
    threads: 2  # figures are drawn in parallel
    shell:
        "{params.python} -m estbench.report.render --store {input.store:q} 2> {log:q}"
