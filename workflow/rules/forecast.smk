# The operational forecast of one issue date. It starts from the newest restart that fits
# (the assimilation run's restart.nc, or an earlier day's forecast restart), takes in the
# readings since then and writes the new restart beside the forecast. restart.nc is an
# input only while it does not exist (a first run makes it): a day's new records refresh
# the prepared layer, and that must rerun only prep and the forecast, never the long
# assimilation run, the hindcasts or the study's figures.


def _first_restart(wildcards):
    restart = f"{RESULTS}/restart.nc"
    return [] if os.path.exists(restart) else [restart]


rule forecast:
    """Ensemble forecast and flood-threshold exceedance probabilities for one issue date, and
    its bulletin (page, a PNG per basin, raised alerts as JSON and CSV)."""
    input:
        PREPARED,
        _first_restart,
    output:
        f"{RESULTS}/forecasts/forecast-{{date}}.nc",
        f"{RESULTS}/forecasts/restart-{{date}}.nc",
        f"{RESULTS}/forecasts/bulletin-{{date}}.html",
        directory(f"{RESULTS}/forecasts/bulletin-{{date}}"),
        f"{RESULTS}/forecasts/alerts-{{date}}.json",
        f"{RESULTS}/forecasts/alerts-{{date}}.csv",
    wildcard_constraints:
        date=r"\d{4}-\d{2}-\d{2}",
    params:
        settings=settings("model", "ensemble", "perturbation", "filter", "forecast", "bulletin"),
    threads: workflow.cores
    log:
        f"{LOGS}/forecast-{{date}}.log",
    benchmark:
        f"{BENCH}/forecast-{{date}}.tsv"
    shell:
        "{ASSIM} forecast --issue-date {wildcards.date} {CLI_CONFIG}"
        " --set ensemble.workers={threads} > {log} 2>&1"


rule issue:
    """Target for the scheduled daily run: only the forecast of `issue_date`."""
    input:
        [str(paths.forecast(CFG, issue_date()))] if issue_date() else [],
