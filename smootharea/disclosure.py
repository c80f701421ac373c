"""Disclosure control for published outputs (common practice, METHODS.md section 6).

Small counts can identify people. Published tables mask every count below the
job's ``suppress_below`` and every figure from which the count could be read back
(the SMR and its limits, since O = SMR * E). The model itself always uses the
true counts; only what leaves the tool is masked. The threshold is a local rule.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

COUNT_REVEALING_COLUMNS = ("observed", "smr", "smr_lower", "smr_upper")


def suppressed_mask(observed, suppress_below: int) -> np.ndarray:
    """True where the count must not be published.

    Primary suppression hides every count below ``suppress_below``. The total of all counts
    can be recovered from published figures (with internal standardisation sum O = sum E, and
    the GLM intercept gives sum O / sum E), so a single hidden count could be read back by
    subtraction; when exactly one area is hidden, the next-smallest count is hidden with it
    (complementary suppression, common practice in statistical disclosure control).
    """
    observed = np.asarray(observed)
    hidden = observed < suppress_below
    if hidden.sum() == 1 and len(observed) > 1:
        candidates = np.where(hidden, np.iinfo(np.int64).max, observed.astype(np.int64))
        hidden[int(np.argmin(candidates))] = True
    return hidden


def mask_small_counts(table: pd.DataFrame, suppress_below: int,
                      observed_column: str = "observed") -> pd.DataFrame:
    """A copy of ``table`` with count-revealing columns blanked where counts are small.

    Adds a boolean ``suppressed`` column so maps can hatch those areas.
    """
    masked = table.copy()
    hidden = suppressed_mask(masked[observed_column].to_numpy(), suppress_below)
    for column in COUNT_REVEALING_COLUMNS:
        if column in masked:
            masked[column] = masked[column].astype("Float64" if column != "observed" else "Int64")
            masked.loc[hidden, column] = pd.NA
    masked["suppressed"] = hidden
    return masked
