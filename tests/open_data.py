"""Field books made from the open datasets in tests/data, shared by the test modules."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from trialdesk.core.fieldbook import FieldBook, read_fieldbook

DATA = Path(__file__).parent / "data"


def oats_fieldbook(folder: Path, missing=(3, 17, 40)) -> tuple[FieldBook, pd.DataFrame]:
    """MASS oats (Yates 1935) as 12 entries (variety x nitrogen) in 6 complete blocks, with the
    plots at ``missing`` deleted; written to ``folder`` as a CSV field book and read back.
    Returns the field book and the frame written (missing plots as NaN)."""
    frame = pd.read_csv(DATA / "oats.csv")
    frame["entry"] = frame["V"] + ":" + frame["N"]
    frame = frame.rename(columns={"B": "block", "Y": "yield"})[["block", "entry", "yield"]]
    frame["yield"] = frame["yield"].astype(float)
    frame.loc[list(missing), "yield"] = np.nan
    path = folder / "oats.csv"
    frame.to_csv(path, index=False)
    return read_fieldbook(path), frame
