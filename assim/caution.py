"""The caution that every forecast product, figure, report and CLI run carries."""

CAUTION = (
    "Research guidance only: these ensemble streamflow forecasts and exceedance "
    "probabilities are experimental, are subordinate to official flood warnings, and must "
    "not replace the advice of official warning services and local authorities."
)

CAUTION_SHORT = "Research guidance only - subordinate to official flood warnings and local authorities."
