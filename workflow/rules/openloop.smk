rule openloop:
    """Ensemble run without assimilation: the reference the filter must beat."""
    input:
        PREPARED,
    output:
        f"{RESULTS}/openloop.nc",
        f"{RESULTS}/restart-openloop.nc",
    params:
        settings=settings("period", "model", "ensemble", "perturbation", "outputs"),
    threads: workflow.cores
    resources:
        mem_mb=2000,
    log:
        f"{LOGS}/openloop.log",
    benchmark:
        f"{BENCH}/openloop.tsv"
    shell:
        "{ASSIM} run --mode openloop {CLI_CONFIG} --set ensemble.workers={threads} > {log} 2>&1"
