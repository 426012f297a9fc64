rule assimilation:
    """Ensemble run correcting the storage states with each gauge reading (EnKF family)."""
    input:
        PREPARED,
    output:
        f"{RESULTS}/analysis.nc",
        f"{RESULTS}/restart.nc",
    params:
        settings=settings("period", "model", "ensemble", "perturbation", "filter", "outputs"),
    threads: workflow.cores
    resources:
        mem_mb=2000,
    log:
        f"{LOGS}/assimilation.log",
    benchmark:
        f"{BENCH}/assimilation.tsv"
    shell:
        "{ASSIM} run --mode assimilate {CLI_CONFIG} --set ensemble.workers={threads} > {log} 2>&1"


rule reanalysis:
    """The fixed-lag smoothed ensemble over the period (filter.smoother.window_days); not part
    of `all`: `snakemake reanalysis`."""
    input:
        PREPARED,
    output:
        f"{RESULTS}/reanalysis.nc",
        f"{RESULTS}/restart-reanalysis.nc",
    params:
        settings=settings("period", "model", "ensemble", "perturbation", "filter", "outputs"),
    threads: workflow.cores
    resources:
        mem_mb=2000,
    log:
        f"{LOGS}/reanalysis.log",
    benchmark:
        f"{BENCH}/reanalysis.tsv"
    shell:
        "{ASSIM} run --mode reanalysis {CLI_CONFIG} --set ensemble.workers={threads} > {log} 2>&1"
