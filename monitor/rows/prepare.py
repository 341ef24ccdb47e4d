"""The one row path: a frame of raw rows -> validated design rows and rejects.

Every path that turns raw rows into estimates calls this module: the live engine
(:meth:`monitor.live.monitor.Monitor.process_batch`), replay whole and chunked
(:mod:`monitor.replay.kernel`, :func:`monitor.replay.driver.run_replay`), the Dask partitions,
tuning (:mod:`monitor.tuning.rows`) and the dashboard's replay page (through the replay
driver). Two steps, so that the live engine can drop rows the store has already seen between
them:

1. :func:`check_rows`: validation with the carried per-series gate
   (:func:`monitor.rows.validate.validate_frame`) in the chosen order, row numbers mapped onto
   the source's own (file row numbers from the one CSV line reader,
   :func:`monitor.ingest.csv_text.read_csv_chunk`, blank lines counted), and the reader's line
   rejects merged in, so every path reports the same row, field, value text and reason;
2. :func:`design_rows` / :func:`prepare_rows`: series codes, the design matrix
   ``[1, log p, controls]`` and the response.

Places where later additions plug in:

- composite series ids: ``ValidationSettings.key`` (``[series] key`` with two or more
  columns) joins the key columns into one id inside validation
  (:func:`monitor.groups.keys.compose_series`), a blank part rejected naming its column;
- ``extra_columns``: further numeric columns checked like controls (a number, finite) and
  carried through in ``good`` untouched (exposure, instruments);
- the response per model: :func:`response` is ``log q`` unless the estimator says otherwise
  (an estimator with ``zero_quantity_ok = True``, the Poisson model, takes ``q`` itself and
  its zero quantities as data: pass ``zero_policy="keep"`` in the validation settings).

Ordering: ``order`` is ``"time"`` (each series' rows in timestamp order; a row that arrived
late in the batch is sorted into place) or ``"arrival"`` (rows in arrival order; one older than
the series' newest accepted time beyond the allowed lateness is rejected as late, and results
do not depend on where batches were cut). :func:`order_of` resolves ``[validation] order``
(``"auto"``: the path's own default, time for replay, arrival for the live service).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd

from monitor.estimators.iv import est_instruments
from monitor.estimators.transform import design_matrix
from monitor.rows.validate import SeriesGate, Validated, ValidationSettings, renumber, validate_frame

ORDERS = ("time", "arrival")


def order_of(settings: ValidationSettings | None, default: str) -> str:
    """The validation order of a path: ``[validation] order`` unless it is ``"auto"``."""
    order = getattr(settings, "order", "auto") if settings is not None else "auto"
    return default if order == "auto" else order


def check_rows(frame: pd.DataFrame, est, *, settings: ValidationSettings | None = None,
               gate: SeriesGate | None = None, now_ns: int | None = None,
               rows: np.ndarray | None = None, row_offset: int = 0,
               line_rejects: pd.DataFrame | None = None, order: str = "time",
               extra_columns: Sequence[str] = ()) -> Validated:
    """Validate a frame of raw rows (arrival order) for estimator ``est``.

    Parameters
    ----------
    frame : DataFrame
        Raw columns (canonical names) ``series, ts, price, quantity``, controls, extras.
    est : estimator prototype
        Supplies ``controls`` and ``log_controls``.
    settings, gate, now_ns
        As :func:`monitor.rows.validate.validate_frame` (the gate carries across batches).
    rows : int array, optional
        Each frame row's row number in its source (1-based data rows, blank lines counted);
        else ``row_offset + 1, ...``.
    line_rejects : DataFrame, optional
        Lines the reader could not split into fields (columns of ``REJECT_COLUMNS``), merged
        into the rejects in row order.
    order : "time" or "arrival"
        See the module docstring.
    extra_columns : list of str
        Numeric columns checked like controls and carried in ``good``.

    Returns
    -------
    Validated
        ``good`` in processing order with the source's ``row``; ``rejects`` (reader's and
        validation's, by row); ``zero_skipped``.
    """
    if order not in ORDERS:
        raise ValueError(f"order = {order!r}: must be one of {', '.join(ORDERS)}")
    controls = list(est.controls) + [c for c in extra_columns if c not in est.controls]
    # instruments (issue 17) are checked like controls: a number, finite (> 0 when logged)
    controls += list(est_instruments(est))
    v = validate_frame(frame, controls=controls,
                       log_controls=list(est.log_controls) + list(est_instruments(est, True))
                       + ([est.exposure] if getattr(est, "exposure", "") else []),
                       settings=settings, gate=gate, now_ns=now_ns,
                       row_offset=0 if rows is not None else row_offset, order_by=order,
                       exposure=getattr(est, "exposure", "") or "")
    if rows is not None:
        v = renumber(v, np.asarray(rows, dtype=np.int64))
    if line_rejects is not None and len(line_rejects):
        rej = v.rejects
        both = pd.concat([line_rejects, rej], ignore_index=True) if len(rej) else line_rejects
        both = both.sort_values("row", kind="stable").reset_index(drop=True)
        v = Validated(good=v.good, rejects=both, zero_skipped=v.zero_skipped, sid=v.sid)
    return v


def offset_of(good: pd.DataFrame, est) -> np.ndarray | None:
    """``log(exposure)`` per good row for an estimator with an exposure column (the Poisson
    model's ``est.exposure``), else None (validated > 0 by :func:`check_rows`)."""
    col = getattr(est, "exposure", "")
    return np.log(good[col].to_numpy(dtype=np.float64)) if col else None


def response(good: pd.DataFrame, est) -> np.ndarray:
    """The estimator's response column: ``log q`` (float64), or ``q`` itself for an estimator
    that takes zero quantities as data (``est.zero_quantity_ok``)."""
    q = good["quantity"].to_numpy(dtype=np.float64)
    return q if getattr(est, "zero_quantity_ok", False) else np.log(q)


def design_rows(good: pd.DataFrame, est) -> tuple[np.ndarray, np.ndarray]:
    """Design matrix ``[1, log p, controls]`` and the response of validated rows."""
    specs = est.control_specs
    X = design_matrix(good["price"].to_numpy(), {c.name: good[c.name].to_numpy() for c in specs},
                      specs)
    return X, response(good, est)


def prepare_rows(good: pd.DataFrame, est) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """Series codes (first appearance order), design matrix, response and series names of
    validated rows."""
    codes, names = pd.factorize(good["series"], sort=False)
    X, y = design_rows(good, est)
    return codes.astype(np.int64), X, y, [str(n) for n in names]
