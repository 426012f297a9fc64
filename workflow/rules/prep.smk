rule prep:
    """Raw records (basins.yaml, weather.csv, gauge.csv) -> prepared CF NetCDF."""
    input:
        RAW,
        # parameters from `assim calibrate`, when the config points at them
        [CFG["model"]["calibrated_parameters"]] if CFG["model"]["calibrated_parameters"] else [],
    output:
        # updated in place, not removed before the job: `assim prep` appends the new days to
        # the layer it finds (and replaces the files together itself)
        [update(p) for p in PREPARED],
    params:
        settings=settings("data", "model"),
    log:
        f"{LOGS}/prep.log",
    shell:
        "{ASSIM} prep {CLI_CONFIG} > {log} 2>&1"
