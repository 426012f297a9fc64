"""Small scenarios cut from the invented sample basins, shared by the CLI-level tests."""

from pathlib import Path

import pandas as pd
import yaml

REPO = Path(__file__).resolve().parents[1]


def make_raw(folder: Path, ids, start: str, end: str, gauge_filter=None) -> Path:
    """A raw folder of basins ``ids`` cut from sample_basin/ to the days start..end;
    ``gauge_filter(df) -> df`` edits the gauge readings (outages, late readings)."""
    sample = REPO / "sample_basin"
    folder.mkdir(parents=True, exist_ok=True)
    doc = yaml.safe_load((sample / "basins.yaml").read_text())
    doc["basins"] = [b for b in doc["basins"] if b["id"] in ids]
    (folder / "basins.yaml").write_text(yaml.safe_dump(doc, sort_keys=False))
    w = pd.read_csv(sample / "weather.csv", dtype=str)
    w[w["basin"].isin(ids) & (w["date"] >= start) & (w["date"] <= end)].to_csv(folder / "weather.csv", index=False)
    g = pd.read_csv(sample / "gauge.csv", dtype=str)
    day = g["timestamp"].str[:10]
    g = g[g["basin"].isin(ids) & (day >= start) & (day <= end)]
    if gauge_filter is not None:
        g = gauge_filter(g)
    g.to_csv(folder / "gauge.csv", index=False)
    return folder


def write_config(root: Path, defaults: dict, **sections) -> Path:
    """``root/config.yaml`` from ``defaults`` with each section in ``sections`` merged in."""
    cfg = {k: dict(v) if isinstance(v, dict) else v for k, v in defaults.items()}
    for k, v in sections.items():
        cfg[k] = {**cfg.get(k, {}), **v} if isinstance(v, dict) else v
    path = root / "config.yaml"
    path.write_text(yaml.safe_dump(cfg, sort_keys=False))
    return path
