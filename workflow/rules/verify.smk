rule verify:
    """Skill by basin, experiment and lead against the gauge observations."""
    input:
        PREPARED,
        f"{RESULTS}/openloop.nc",
        f"{RESULTS}/analysis.nc",
        f"{RESULTS}/hindcast.nc",
    output:
        f"{RESULTS}/skill.nc",
        f"{RESULTS}/skill.csv",
    log:
        f"{LOGS}/verify.log",
    shell:
        "{ASSIM} verify {CLI_CONFIG} > {log} 2>&1"
