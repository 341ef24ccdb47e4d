"""The row path: validated rows -> the series codes, log-log design matrix and log quantity
that the pipeline runs over."""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor.estimators.transform import design_matrix


def prepare_rows(good: pd.DataFrame, est) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """Series codes, design matrix and log quantity for validated rows sorted by series, ts."""
    codes, names = pd.factorize(good["series"], sort=False)
    specs = est._specs
    X = design_matrix(good["price"].to_numpy(), {c.name: good[c.name].to_numpy() for c in specs}, specs)
    y = np.log(good["quantity"].to_numpy(dtype=np.float64))
    return codes.astype(np.int64), X, y, [str(n) for n in names]
