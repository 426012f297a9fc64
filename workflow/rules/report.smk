rule report:
    """One self-contained HTML report: caution, provenance, skill table, figures."""
    input:
        f"{RESULTS}/skill.nc",
        f"{RESULTS}/figures",
    output:
        f"{RESULTS}/report.html",
    log:
        f"{LOGS}/report.log",
    shell:
        "{ASSIM} report {CLI_CONFIG} > {log} 2>&1"
