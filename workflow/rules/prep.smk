rule prep:
    """Raw records (basins.yaml, weather.csv, gauge.csv) -> prepared CF NetCDF."""
    input:
        RAW,
    output:
        PREPARED,
    params:
        settings=settings("data"),
    log:
        f"{LOGS}/prep.log",
    shell:
        "{ASSIM} prep {CLI_CONFIG} > {log} 2>&1"
