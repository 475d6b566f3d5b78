# Everything here reads the store only.
rule report:
    input:
        store=STORE,
        templates=[str(paths.REPORT_TEMPLATES / "report.html.j2"), str(paths.REPORT_TEMPLATES / "report.css")],
    output:
        html=REPORT_HTML,
        csv=PERFORMANCE_CSV,
    log:
        f"{RESULTS}/logs/report.log",
    threads: 2  # figures are drawn in parallel
    shell:
        "{PYTHON} -m estbench.report --store {input.store:q} --html {output.html:q} --csv {output.csv:q} 2> {log:q}"
