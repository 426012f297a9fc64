rule hindcast:
    """Forecasts issued every K days from open-loop and from assimilation states."""
    input:
        PREPARED,
    output:
        f"{RESULTS}/hindcast.nc",
    params:
        settings=settings(
            "period", "model", "ensemble", "perturbation", "filter", "hindcast", "outputs"
        ),
    threads: workflow.cores
    resources:
        mem_mb=3000,
    log:
        f"{LOGS}/hindcast.log",
    benchmark:
        f"{BENCH}/hindcast.tsv"
    shell:
        "{ASSIM} hindcast {CLI_CONFIG} --set ensemble.workers={threads} > {log} 2>&1"
