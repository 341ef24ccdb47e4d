"""Result frames of a pipeline run over validated rows: the estimates and alerts tables that
replay writes (``estimates.csv``, ``alerts.csv``) and the live engine stores, with their column
lists; times are ISO 8601 UTC text (:func:`monitor.rows.isotime.format_ts`)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor.estimators import kernel as K
from monitor.pipeline.messages import CHANGE_COLUMNS, events_frame
from monitor.rows.isotime import format_ts, iso_utc
from monitor.types import STATUS_LABELS


ESTIMATE_COLUMNS = ["series", "ts", "beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "status",
                    "intercept", "resid_sd", "innovation", "z", "band"]

#: ``band``: the kind of the estimate's band (``[estimator] band``: "hc", "hac" or "classic",
#: from the kernel's output column ``O_BAND``); empty (NULL) where the estimate has no band
#: (``beta_lo`` NaN: status warming_up or low_variation says why)
BAND_KINDS = tuple(K.BAND_NAMES[c] for c in sorted(K.BAND_NAMES))


def band_index(out: np.ndarray) -> np.ndarray:
    """Each output row's index into :data:`BAND_KINDS`, ``len(BAND_KINDS)`` where the row has
    no band (``beta_lo`` or ``beta_hi`` NaN)."""
    code = out[:, K.O_BAND]
    has = np.isfinite(out[:, K.O_LO]) & np.isfinite(out[:, K.O_HI]) & np.isfinite(code)
    return np.where(has, np.nan_to_num(code, nan=0.0), len(BAND_KINDS)).astype(np.int64)


def band_kinds(out: np.ndarray) -> np.ndarray:
    """The band kind of each output row (object array of "classic" / "hc" / "hac"), ``None``
    where the row has no band (``beta_lo`` or ``beta_hi`` NaN)."""
    return np.array(BAND_KINDS + (None,), dtype=object)[band_index(out)]


#: a change alert (elasticity_change, level_shift) also carries CHANGE_COLUMNS: the
#: estimated change time, b before and after it with intervals, and the size of the change
ALERT_COLUMNS = ["series", "ts", "rule", "beta", "beta_lo", "beta_hi", "message"] + CHANGE_COLUMNS


REJECT_OUT_COLUMNS = ["row", "series", "ts", "field", "value", "reason"]


def estimates_frame(good: pd.DataFrame, out: np.ndarray, status: np.ndarray) -> pd.DataFrame:
    """Estimates table; with instruments (an IV estimator's wider rows) it gains
    ``first_stage_f``, the effective first-stage F of each estimate."""
    labels = np.array(STATUS_LABELS, dtype=object)[status]
    if out.shape[1] > K.NOUT:
        from monitor.estimators.iv_kernel import O_FSTAT

        return _estimates(good, out, labels).assign(first_stage_f=out[:, O_FSTAT])
    return _estimates(good, out, labels)


def _estimates(good: pd.DataFrame, out: np.ndarray, labels: np.ndarray) -> pd.DataFrame:
    return pd.DataFrame({
        "series": good["series"].to_numpy(), "ts": _iso_text(good["ts"].to_numpy()),
        "beta": out[:, K.O_BETA], "beta_se": out[:, K.O_SE], "beta_lo": out[:, K.O_LO],
        "beta_hi": out[:, K.O_HI], "n_eff": out[:, K.O_NEFF], "status": labels,
        "intercept": out[:, K.O_INTERCEPT], "resid_sd": out[:, K.O_RESID_SD],
        "innovation": out[:, K.O_E], "z": out[:, K.O_Z], "band": band_kinds(out)})


def _iso_text(ns: np.ndarray) -> np.ndarray:
    """:func:`monitor.rows.isotime.format_ts` of int64 ns as an object array of ``str``,
    written by the compiled :func:`monitor.rows.isotime.iso_utc` (the same text; it hands
    sub-second and far times to ``format_ts`` itself)."""
    return iso_utc(ns).to_numpy(zero_copy_only=False).astype(object)


def _change_columns(ev: pd.DataFrame) -> dict:
    """CHANGE_COLUMNS from the events' details (None / NaN where an alert has none)."""
    det = ev["details"].tolist()
    size = [d.get("beta_change", d.get("level_shift_log")) for d in det]
    out = {"change_ts": [d.get("change_ts") for d in det],
           "size": np.array([np.nan if v is None else v for v in size], dtype=np.float64)}
    for c in CHANGE_COLUMNS:
        if c not in out:
            out[c] = np.array([np.nan if d.get(c) is None else d[c] for d in det], dtype=np.float64)
    return out


def alerts_frame(result, good: pd.DataFrame, names: list[str]) -> pd.DataFrame:
    """The opened alerts of a :class:`~monitor.pipeline.run.PipelineResult` as replay
    ``alerts.csv`` rows: ``series, ts, rule, beta, beta_lo, beta_hi, message`` plus ``severity``
    (rule = kind); ``good`` are the rows the pipeline ran over, ``names`` the series names."""
    if result.names is None and names is not None:
        ev = events_frame(result.records, result.sid, list(names), result.interval_mode,
                          result.feedback, result.feedback_events, result.wording)
    else:
        ev = result.events
    ev = ev[ev["action"] == "open"]
    cols = ALERT_COLUMNS + ["severity"]
    if not len(ev):
        return pd.DataFrame(columns=cols)
    rows = ev["row"].to_numpy()
    change = _change_columns(ev)
    return pd.DataFrame({**change,
        "series": good["series"].iloc[rows].to_numpy(),       # no object copy of the column
        "ts": format_ts(good["ts"].to_numpy()[rows]), "rule": ev["kind"].to_numpy(),
        "beta": ev["beta"].to_numpy(), "beta_lo": ev["beta_lo"].to_numpy(),
        "beta_hi": ev["beta_hi"].to_numpy(), "message": ev["message"].to_numpy(),
        "severity": ev["severity"].to_numpy()}, columns=cols)
