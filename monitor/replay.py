"""Full-speed replay of an observation log through the same core the live service runs.

``run_replay(log, out_dir, config)`` reads the log (pyarrow), validates every row (rejects kept
with reasons), runs each series through the compiled pipeline in timestamp order, and writes:

- ``estimates.csv``: ``series, ts, beta, beta_se, beta_lo, beta_hi, n_eff, status, intercept,
  resid_sd, innovation, z`` (one row per processed observation; empty fields only where the
  status is ``warming_up``);
- ``alerts.csv``: ``series, ts, rule, beta, beta_lo, beta_hi, message``;
- ``rejects.csv``: ``row, series, ts, field, value, reason``;
- ``summary.json``: counts, the final estimate per series, the settings used, timing.
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.config import Config, estimator_from_config, validation_from_config
from monitor.errors import SourceError
from monitor.estimators import kernel as K
from monitor.logio import read_log, write_table
from monitor.pipeline import Pipeline
from monitor.transform import design_matrix
from monitor.types import STATUS_LABELS
from monitor.validate import format_ts, validate_frame

ESTIMATE_COLUMNS = ["series", "ts", "beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "status",
                    "intercept", "resid_sd", "innovation", "z"]
ALERT_COLUMNS = ["series", "ts", "rule", "beta", "beta_lo", "beta_hi", "message"]
REJECT_OUT_COLUMNS = ["row", "series", "ts", "field", "value", "reason"]


def prepare_rows(good: pd.DataFrame, est) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """Series codes, design matrix and log quantity for validated rows sorted by series, ts."""
    codes, names = pd.factorize(good["series"], sort=False)
    specs = est._specs
    X = design_matrix(good["price"].to_numpy(), {c.name: good[c.name].to_numpy() for c in specs}, specs)
    y = np.log(good["quantity"].to_numpy(dtype=np.float64))
    return codes.astype(np.int64), X, y, [str(n) for n in names]


def estimates_frame(good: pd.DataFrame, out: np.ndarray, status: np.ndarray) -> pd.DataFrame:
    labels = np.array(STATUS_LABELS, dtype=object)[status]
    return pd.DataFrame({
        "series": good["series"].to_numpy(), "ts": format_ts(good["ts"].to_numpy()),
        "beta": out[:, K.O_BETA], "beta_se": out[:, K.O_SE], "beta_lo": out[:, K.O_LO],
        "beta_hi": out[:, K.O_HI], "n_eff": out[:, K.O_NEFF], "status": labels,
        "intercept": out[:, K.O_INTERCEPT], "resid_sd": out[:, K.O_RESID_SD],
        "innovation": out[:, K.O_E], "z": out[:, K.O_Z]})


def _json_float(v: float):
    return None if v is None or not math.isfinite(v) else float(v)


def run_replay(log_path, out_dir, config: Config | None = None, quiet: bool = True,
               now_ns: int | None = None) -> dict:
    """Replay ``log_path`` and write the result files into ``out_dir``; returns the summary.

    Rows are processed in timestamp order within each series, so a row that arrived late in the
    file is not "late" here (lateness is an arrival-order rule of the live service). Timestamps
    more than ``max_future_s`` after ``now_ns`` (default: the wall clock at the start) are rejected.
    """
    t0 = time.perf_counter()
    config = config or Config()
    est = estimator_from_config(config)
    vset = validation_from_config(config)
    pipe = Pipeline.from_config(config, est)
    frame = read_log(log_path, config.section("columns"))
    t_read = time.perf_counter()
    # future timestamps are judged against the wall clock when the replay starts
    v = validate_frame(frame, controls=est.controls, log_controls=est.log_controls, settings=vset,
                       now_ns=time.time_ns() if now_ns is None else now_ns)
    good = v.good
    sid, X, y, names = prepare_rows(good, est)
    result = pipe.run(sid, X, y, n_series=len(names), ts=good["ts"].to_numpy(dtype=np.int64),
                      names=names)
    t_core = time.perf_counter()

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    estimates = estimates_frame(good, result.out, result.status)
    write_table(estimates, out_dir / "estimates.csv")
    alerts = result.alerts_frame(good, names)
    write_table(alerts[ALERT_COLUMNS] if len(alerts) else pd.DataFrame(columns=ALERT_COLUMNS),
                out_dir / "alerts.csv")
    rejects = v.rejects[REJECT_OUT_COLUMNS]
    write_table(rejects.astype({"row": "int64"}) if len(rejects) else pd.DataFrame(columns=REJECT_OUT_COLUMNS),
                out_dir / "rejects.csv")

    final = {}
    if len(good):
        last = np.flatnonzero(np.r_[sid[1:] != sid[:-1], True])
        for j in last:
            o = result.out[j]
            final[names[sid[j]]] = {
                "ts": estimates["ts"].iat[j], "beta": _json_float(o[K.O_BETA]),
                "beta_se": _json_float(o[K.O_SE]), "beta_lo": _json_float(o[K.O_LO]),
                "beta_hi": _json_float(o[K.O_HI]), "n_eff": _json_float(o[K.O_NEFF]),
                "status": STATUS_LABELS[int(result.status[j])],
                "n_obs": int(np.count_nonzero(sid == sid[j]))}
    wall = time.perf_counter() - t0
    summary = {
        "log": str(log_path),
        "rows": int(len(frame)), "accepted": int(len(good)), "rejected": int(len(v.rejects)),
        "zero_skipped": int(len(v.zero_skipped)), "series": len(names),
        "alerts": int(len(alerts)),
        "alerts_by_rule": {str(k): int(c) for k, c in alerts["rule"].value_counts().items()} if len(alerts) else {},
        "status_counts": {s["status"]: sum(1 for f in final.values() if f["status"] == s["status"]) for s in final.values()},
        "final": final,
        "settings": {"estimator": est._params(), "validation": vset.__dict__,
                     "columns": config.section("columns"), **pipe.settings()},
        "timing": {"wall_s": wall, "read_s": t_read - t0, "core_s": t_core - t_read,
                   "rows_per_s": len(frame) / wall if wall > 0 else None},
    }
    (out_dir / "summary.json").write_text(json.dumps(summary, indent=2, sort_keys=True))
    return summary


def check_log(path) -> None:
    if not Path(path).exists():
        raise SourceError(f"{path}: no such file")
