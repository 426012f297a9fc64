rule calibrate:
    """Calibrate each basin's parameters against its gauge -> calibration.nc (not part of
    `all`: run `snakemake calibrate`, then point model.calibrated_parameters at the file).
    It reads the raw records, not the prepared layer, so prep can depend on its output."""
    input:
        RAW,
    output:
        str(paths.calibration(CFG)),
    params:
        settings=settings("data", "calibration", "ensemble"),
    log:
        f"{LOGS}/calibrate.log",
    shell:
        "{ASSIM} calibrate {CLI_CONFIG} > {log} 2>&1"
