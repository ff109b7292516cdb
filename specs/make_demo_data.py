"""Generate the demo data set (invented): canal access, irrigation and farm yields.

The scenario is made up for specflow's demo. A government dug irrigation canals decades ago;
farms closer to a canal irrigate a larger share of their land. We want the effect of the
irrigated share on log yield. Farmers' unobserved skill raises both irrigation and yield, so
OLS is biased upwards. Two instruments: distance to the nearest canal (strong) and rainfall in
the upstream catchment last season (weak by design). Farms sit in 40 districts (the cluster)
and were surveyed in one of 5 rounds (a fixed effect). Some values are missing.

True effect of ``irrigated_share`` on log yield: 0.60 (the structural coefficient; with a
constant effect it is also the complier average). Run: ``python specs/make_demo_data.py``.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd

TRUE_EFFECT = 0.60


def make(n: int = 4000, seed: int = 20261202) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    district = rng.integers(0, 40, n)
    rnd = rng.integers(1, 6, n)
    d_canal = rng.gamma(2.0, 2.0, 40)  # district's typical distance to a canal (km)
    canal_km = np.clip(d_canal[district] + rng.normal(0, 1.5, n), 0.1, None)
    d_rain = rng.normal(0, 1, 40)
    upstream_rain = d_rain[district] * 0.3 + rng.normal(0, 1, n)
    skill = rng.normal(0, 1, n)  # unobserved
    farm_ha = np.exp(rng.normal(0.7, 0.6, n))
    soil_index = rng.normal(0, 1, n)
    elevation = rng.normal(300, 60, n) + 10 * d_canal[district]
    round_effect = np.array([0.0, 0.05, -0.08, 0.02, 0.10])[rnd - 1]
    latent = (0.75 - 0.055 * canal_km + 0.004 * upstream_rain + 0.07 * skill + 0.03 * soil_index
              + 0.02 * np.log(farm_ha) + rng.normal(0, 0.12, n))
    irrigated_share = np.clip(latent, 0.0, 1.0)
    district_shock = rng.normal(0, 0.08, 40)[district]
    log_yield = (1.1 + TRUE_EFFECT * irrigated_share + 0.25 * skill + 0.08 * soil_index
                 + 0.06 * np.log(farm_ha) - 0.0004 * (elevation - 300) + round_effect
                 + district_shock + rng.normal(0, 0.25, n))
    yield_t_ha = np.exp(log_yield)
    df = pd.DataFrame({
        "farm_id": np.arange(1, n + 1),
        "district": district + 1,
        "survey_round": rnd,
        "yield_t_ha": np.round(yield_t_ha, 4),
        "irrigated_share": np.round(irrigated_share, 4),
        "canal_km": np.round(canal_km, 3),
        "upstream_rain": np.round(upstream_rain, 3),
        "farm_ha": np.round(farm_ha, 3),
        "soil_index": np.round(soil_index, 3),
        "elevation_m": np.round(elevation, 1),
    })
    # missing values, as in any survey
    df.loc[rng.random(n) < 0.02, "soil_index"] = np.nan
    df.loc[rng.random(n) < 0.01, "yield_t_ha"] = np.nan
    return df


if __name__ == "__main__":
    out = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).with_name("data") / "farms.csv"
    out.parent.mkdir(parents=True, exist_ok=True)
    make().to_csv(out, index=False, lineterminator="\n")
    print(f"wrote {out}")
