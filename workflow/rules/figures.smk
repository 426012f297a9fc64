rule figures:
    """Hydrographs, skill by lead, rank histograms, reliability and the forecast plume."""
    input:
        f"{RESULTS}/openloop.nc",
        f"{RESULTS}/analysis.nc",
        f"{RESULTS}/hindcast.nc",
        f"{RESULTS}/skill.nc",
        [str(paths.forecast(CFG, issue_date()))] if issue_date() else [],
    output:
        directory(f"{RESULTS}/figures"),
    params:
        settings=settings("outputs", "forecast", "plots", "bulletin"),
        issue=f"--issue-date {issue_date()}" if issue_date() else "",
    log:
        f"{LOGS}/figures.log",
    shell:
        "{ASSIM} plot {CLI_CONFIG} {params.issue} > {log} 2>&1"
