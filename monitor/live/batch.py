"""Pieces of one engine batch: the store-side duplicate check, frames to write.

Used by :class:`monitor.live.monitor.Monitor`; nothing here holds state between batches.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from monitor.rows.isotime import format_ts
from monitor.rows.validate import REJECT_COLUMNS, REQUIRED, parse_numbers, separator_hint
from monitor.store import existing_observation_keys


NAT = np.iinfo(np.int64).min
DUPLICATE = "duplicate row: same series and timestamp as an earlier row"
LATE = "late row: older than the series' last accepted time beyond the allowed lateness"


@dataclass
class BatchReport:
    """What one committed batch did.

    ``rows`` counts the source rows the batch accounts for (accepted + rejected + zero-skipped
    + blank lines); ``estimates`` holds every estimate computed (before thinning), ``rejects``
    every rejected row with its reason.
    """

    source: str
    rows: int = 0
    accepted: int = 0
    rejected: int = 0
    zero_skipped: int = 0
    series: int = 0
    alerts_opened: list = field(default_factory=list)
    alerts_resolved: list = field(default_factory=list)
    position: dict | None = None
    notice: str | None = None
    seconds: float = 0.0
    estimates: pd.DataFrame = field(default_factory=pd.DataFrame, repr=False)
    rejects: pd.DataFrame = field(default_factory=pd.DataFrame, repr=False)


def _cell(v) -> str:
    if v is None or v is pd.NA or v is pd.NaT:
        return ""
    if isinstance(v, float) and math.isnan(v):
        return "nan"
    if isinstance(v, pd.Timestamp):
        return str(format_ts(np.array([v.value if v.tzinfo is None else
                                       v.tz_convert("UTC").value]))[0])
    return str(v)


def raw_rows(frame: pd.DataFrame, idx) -> list[dict]:
    """The raw fields of rows ``idx`` (positions) as dicts of text."""
    return [{k: _cell(v) for k, v in rec.items()}
            for rec in frame.iloc[list(idx)].to_dict(orient="records")]


def missing_column_rejects(frame: pd.DataFrame, rows: np.ndarray, missing: list[str]
                           ) -> pd.DataFrame:
    """Every row of a source that lacks required columns, rejected with that reason."""
    why = (f"missing column(s) {missing}; the source has columns {list(frame.columns)} "
           f"(map names with [columns]){separator_hint(frame.columns)}")
    out = []
    for r, raw in zip(rows, raw_rows(frame, range(len(frame)))):
        out.append({"row": int(r), "series": raw.get("series", ""), "ts": raw.get("ts", ""),
                    "field": missing[0], "value": "", "reason": f"row {int(r)}: {why}",
                    "raw": json.dumps(raw, sort_keys=True)})
    return pd.DataFrame(out, columns=REJECT_COLUMNS)


def zero_rows(frame: pd.DataFrame, zero: pd.DataFrame, controls: list[str],
              exposure: str = "") -> pd.DataFrame:
    """Zero-quantity rows kept as observations (zero policy ``skip``): validated columns
    (the exposure column too when there is one and the frame has it)."""
    local = zero["local"].to_numpy(dtype=np.int64)
    out = pd.DataFrame({"row": zero["row"].to_numpy(dtype=np.int64),
                        "series": zero["series"].astype(str).to_numpy(),
                        "ts": zero["ts"].to_numpy(dtype=np.int64), "local": local})
    extra = [exposure] if exposure and exposure in frame.columns and exposure not in controls \
        else []
    for c in ["price", "quantity"] + controls + extra:
        out[c] = parse_numbers(frame[c].iloc[local].reset_index(drop=True))[0]
    return out


def duplicates_against_store(store, cand: pd.DataFrame, last_seen: dict, reject_all: bool,
                             lateness_ns: int) -> tuple[np.ndarray, np.ndarray]:
    """Flags ``(duplicate, late)`` over candidate rows (columns row, series, ts; any order).

    Validation's gate already rejects a repeat of a series' last accepted time. What it
    cannot see: a late row (within the allowed lateness) that repeats an older stored time,
    two late copies inside one batch, and zero-quantity rows (kept but not gated). Rows are
    judged in arrival order (``row``), against the stored observations of their series when
    their time is not after the newest the engine has seen (``last_seen``: series -> ns).
    """
    n = len(cand)
    dup = np.zeros(n, dtype=bool)
    late = np.zeros(n, dtype=bool)
    if n == 0:
        return dup, late
    order = np.argsort(cand["row"].to_numpy(), kind="stable")
    keys = cand.iloc[order][["series", "ts"]]
    rep = keys.duplicated(keep=False if reject_all else "first").to_numpy()
    dup[order[rep]] = True
    codes, names = pd.factorize(cand["series"])
    if (codes >= 0).all() and all(n in last_seen for n in names):   # each name looked up once
        seen = np.array([last_seen[n] for n in names], dtype=np.int64)[codes]
    else:
        seen = cand["series"].map(last_seen).fillna(NAT).to_numpy(dtype=np.int64)
    ts = cand["ts"].to_numpy(dtype=np.int64)
    check = (ts <= seen) & ~dup
    if check.any():
        sub = cand[check]
        stamps = format_ts(sub["ts"].to_numpy(dtype=np.int64))
        stored = existing_observation_keys(store, pd.DataFrame({"series": sub["series"].to_numpy(),
                                                                "ts": stamps}))
        if stored:
            hit = np.array([(s, t) in stored for s, t in zip(sub["series"], stamps)], dtype=bool)
            dup[np.flatnonzero(check)[hit]] = True
    late = (ts < seen - lateness_ns) & (seen != NAT) & ~dup
    return dup, late


def extra_rejects(frame: pd.DataFrame, local: np.ndarray, rows: np.ndarray, why: str
                  ) -> list[dict]:
    """Reject records for rows found bad after validation (``local`` = frame positions)."""
    out = []
    for r, raw in zip(rows, raw_rows(frame, local)):
        val = raw.get("ts", "")
        out.append({"row": int(r), "series": raw.get("series", ""), "ts": val, "field": "ts",
                    "value": val, "reason": f"row {int(r)}: field 'ts' = {val!r}: {why}",
                    "raw": json.dumps(raw, sort_keys=True)})
    return out


def observation_frame(df: pd.DataFrame, controls: list[str], label: str,
                      ts_text: np.ndarray | None = None, exposure: str = "") -> pd.DataFrame:
    """Rows to store in ``observations`` (``ts`` as ISO text, controls as a dict per row);
    ``ts_text`` is the ISO text of ``df["ts"]`` when already formatted; ``exposure`` names the
    Poisson model's exposure column (``[estimator] exposure``), stored in the ``exposure``
    column (issue 13: a Poisson store can be re-run from its observations); NULL without one
    or where ``df`` lacks it."""
    out = pd.DataFrame({"series": df["series"].astype(str).to_numpy(),
                        "ts": format_ts(df["ts"].to_numpy(dtype=np.int64))
                        if ts_text is None else ts_text,
                        "price": df["price"].to_numpy(dtype=np.float64),
                        "quantity": df["quantity"].to_numpy(dtype=np.float64)})
    if controls:
        vals = {c: df[c].to_numpy(dtype=np.float64).tolist() for c in controls}
        out["controls"] = [dict(zip(controls, v)) for v in zip(*vals.values())]
    else:
        out["controls"] = None
    out["source"] = label
    out["source_row"] = df["row"].to_numpy(dtype=np.int64)
    if exposure and exposure in df.columns:
        out["exposure"] = df[exposure].to_numpy(dtype=np.float64)
    return out


def reject_frame(parts: list[pd.DataFrame], label: str) -> pd.DataFrame:
    """All rejects of a batch for :func:`monitor.store.write_batch` (``raw`` parsed)."""
    parts = [p for p in parts if p is not None and len(p)]
    if not parts:
        return pd.DataFrame(columns=REJECT_COLUMNS + ["source"])
    df = pd.concat(parts, ignore_index=True)
    df = df.assign(source=label,
                   raw=[json.loads(r) if isinstance(r, str) and r else r for r in df["raw"]])
    return df.sort_values("row", kind="stable").reset_index(drop=True)


def alert_changes(res, est: pd.DataFrame, names: list[str], sid: np.ndarray) -> list[dict]:
    """The pipeline's alert events as store alert changes (open / resolve), in row order;
    ``est`` supplies each row's ISO time, ``names[sid[row]]`` its series."""
    events = getattr(res, "events", None)
    if events is None or not len(events):
        return []
    out = []
    for ev in events.sort_values("row", kind="stable").to_dict("records"):
        j = int(ev["row"])
        series, ts = names[int(sid[j])], est["ts"].iat[j]
        if ev["action"] == "open":
            out.append({"action": "open", "series": series, "kind": ev["kind"], "ts": ts,
                        "beta": ev.get("beta"), "beta_lo": ev.get("beta_lo"),
                        "beta_hi": ev.get("beta_hi"), "message": ev["message"],
                        "severity": ev.get("severity") or "warning",
                        "details": ev.get("details")})
        else:
            out.append({"action": "resolve", "series": series, "kind": ev["kind"], "ts": ts,
                        "note": ev.get("message") or "rule cleared"})
    return out


def required_columns(est) -> list[str]:
    return list(REQUIRED) + list(est.controls) + list(est.log_controls)
