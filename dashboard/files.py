"""Files the dashboard reads besides the store: a truth file of known change points and replay
output folders (``elmon replay LOG --out DIR``). Plain pandas, no streamlit.

Truth file: CSV with columns ``series``, ``ts`` (ISO 8601 or epoch seconds, UTC) and ``kind``.
Replay folder: ``estimates.csv``, ``alerts.csv``, ``rejects.csv``, ``summary.json`` and, when a
truth file was used, ``detection.csv`` (one row per change point: ``series, ts, kind, detected,
delay_obs, delay_time, ...``).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.errors import SourceError, ValidationError


TRUTH_COLUMNS = ("series", "ts", "kind")
REPLAY_FILES = ("estimates.csv", "alerts.csv", "rejects.csv", "summary.json")


def load_truth(path) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Read a truth file; return ``(good, rejects)``.

    ``good`` has ``series`` (text), ``ts`` (UTC datetime) and ``kind``; ``rejects`` has ``row``
    (1-based data row), ``field``, ``value`` and ``reason`` for every row that could not be read,
    so none is dropped without a word.
    """
    p = Path(path)
    if not p.is_file():
        raise SourceError(f"truth file {str(p)!r}: not found")
    df = pd.read_csv(p, dtype=str, keep_default_na=False)
    missing = [c for c in TRUTH_COLUMNS if c not in df.columns]
    if missing:
        raise ValidationError(f"truth file {str(p)!r}: missing column(s) {missing}; "
                              f"expected {list(TRUTH_COLUMNS)}, found {list(df.columns)}",
                              field=missing[0])
    raw_ts = df["ts"].str.strip()
    numeric = pd.to_numeric(raw_ts, errors="coerce")
    ts = pd.Series(pd.NaT, index=df.index, dtype="datetime64[ns, UTC]")
    is_num = numeric.notna()
    if is_num.any():
        ts[is_num] = pd.to_datetime(numeric[is_num], unit="s", utc=True)
    if (~is_num).any():
        ts[~is_num] = pd.to_datetime(raw_ts[~is_num], utc=True, format="ISO8601", errors="coerce")
    problems = []
    for i in np.flatnonzero(df["series"].str.strip().eq("").to_numpy()):
        problems.append((i + 1, "series", df["series"].iat[i], "series id is empty"))
    for i in np.flatnonzero(ts.isna().to_numpy()):
        problems.append((i + 1, "ts", df["ts"].iat[i], "not an ISO 8601 time or epoch seconds"))
    rejects = pd.DataFrame(problems, columns=["row", "field", "value", "reason"])
    bad = set(int(r) - 1 for r in rejects["row"])
    keep = np.array([i not in bad for i in range(len(df))], dtype=bool)
    good = pd.DataFrame({"series": df["series"].str.strip()[keep].to_numpy(),
                         "ts": ts[keep].to_numpy(),
                         "kind": df["kind"].str.strip()[keep].to_numpy()})
    return good, rejects.sort_values("row", kind="stable").reset_index(drop=True)


def under_root(path, root, what: str = "path") -> Path:
    """``path`` resolved (relative paths taken from ``root``, symbolic links followed), or a
    :class:`SourceError` when it lies outside ``root`` or no root is configured.

    The Replay page reads and writes only below the root given when the dashboard started
    (``--replay-root``, default the store's folder), so a visitor cannot make the server read
    ``/etc/passwd`` or write elsewhere. The message names the typed path and the root, never
    the content of any file.

    >>> import tempfile, os
    >>> root = tempfile.mkdtemp()
    >>> under_root("out", root) == Path(root).resolve() / "out"
    True
    >>> under_root("../../etc/passwd", root)
    Traceback (most recent call last):
    ...
    monitor.errors.SourceError: path '../../etc/passwd' is outside the replay root; ...
    """
    if not root:
        raise SourceError(f"{what} {str(path)!r}: no replay root is configured (start the "
                          "dashboard with --replay-root DIR)")
    base = Path(root).resolve()
    p = Path(str(path).strip()).expanduser()
    full = (p if p.is_absolute() else base / p).resolve()
    if full != base and base not in full.parents:
        raise SourceError(f"{what} {str(path)!r} is outside the replay root; this dashboard "
                          f"reads and writes replay files only under {str(base)!r} (set with "
                          "elmon dashboard --replay-root DIR)")
    return full


def find_replay_folders(root, max_depth: int = 2) -> list[str]:
    """Folders under ``root`` (itself included, up to ``max_depth`` levels) holding replay output
    (an ``estimates.csv`` next to a ``summary.json``), sorted by path."""
    base = Path(root)
    if not base.is_dir():
        return []
    found = []
    for depth in range(max_depth + 1):
        pattern = "/".join(["*"] * depth + ["summary.json"])
        for f in base.glob(pattern):
            if (f.parent / "estimates.csv").is_file():
                found.append(str(f.parent))
    return sorted(set(found))


#: Columns of replay files that hold the text as read from the input: a bad value such as
#: ``n/a`` or ``NA`` must be shown as written, not turned into a missing value (issue 16).
TEXT_COLUMNS = ("value", "raw", "reason", "field", "series", "message")

#: The words pandas' ``read_csv`` reads as missing by default (its documentation, na_values),
#: still applied to the numeric columns.
NA_WORDS = ("", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND",
            "1.#QNAN", "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null")


def _read_csv(path: Path, name: str) -> pd.DataFrame:
    try:
        head = pd.read_csv(path, nrows=0)
        # text columns: only an empty field is missing; other columns: pandas' usual NA words
        na = {c: ([""] if c in TEXT_COLUMNS else list(NA_WORDS)) for c in head.columns}
        return pd.read_csv(path, keep_default_na=False, na_values=na,
                           dtype={c: str for c in head.columns if c in TEXT_COLUMNS})
    except pd.errors.EmptyDataError:
        return pd.DataFrame()
    except (OSError, pd.errors.ParserError) as exc:
        raise SourceError(f"replay file {str(path)!r} ({name}): cannot be read: {exc}") from exc


def load_replay(folder) -> dict:
    """Read a replay output folder into ``{'estimates', 'alerts', 'rejects', 'detection',
    'summary', 'missing'}``; ``detection`` is ``None`` without a truth file and ``missing`` lists
    the expected files that were absent (``estimates.csv`` is required)."""
    d = Path(folder)
    if not d.is_dir():
        raise SourceError(f"replay folder {str(d)!r}: not a folder")
    if not (d / "estimates.csv").is_file():
        raise SourceError(f"replay folder {str(d)!r}: no estimates.csv, so not replay output "
                          f"(expected {list(REPLAY_FILES)})")
    out: dict = {"missing": [f for f in REPLAY_FILES if not (d / f).is_file()]}
    for name in ("estimates", "alerts", "rejects"):
        f = d / f"{name}.csv"
        out[name] = _read_csv(f, name) if f.is_file() else pd.DataFrame()
    det = d / "detection.csv"
    out["detection"] = _read_csv(det, "detection") if det.is_file() else None
    summ = d / "summary.json"
    if summ.is_file():
        try:
            out["summary"] = json.loads(summ.read_text(encoding="utf-8"))
        except json.JSONDecodeError as exc:
            raise SourceError(f"replay file {str(summ)!r}: not valid JSON: {exc}") from exc
    else:
        out["summary"] = {}
    return out


def _truthy(values: pd.Series) -> np.ndarray:
    if values.dtype == bool:
        return values.to_numpy()
    s = values.astype(str).str.strip().str.lower()
    return s.isin(["true", "1", "yes", "1.0"]).to_numpy()


def detection_summary(detection: pd.DataFrame) -> pd.DataFrame:
    """Per change-point kind (and ``'all'`` when there are several): change points, scored
    (detected or missed), detected, missed, detection rate (detected / scored), median and
    longest detection delay in observations (over the detected ones only).

    Reads the replay's ``detection.csv``: a ``status`` column (``detected``, ``missed``,
    ``no_data``, ``not_scored``, see :mod:`monitor.replay.detection`), or a boolean ``detected`` column.
    """
    cols = ["kind", "change_points", "scored", "detected", "missed", "detection_rate",
            "median_delay_obs", "max_delay_obs"]
    if detection is None or len(detection) == 0:
        return pd.DataFrame(columns=cols)
    det = detection
    if "status" in det:
        status = det["status"].astype(str).str.strip()
        hit = status.eq("detected").to_numpy()
        scored = status.isin(["detected", "missed"]).to_numpy()
    else:
        hit = _truthy(det["detected"]) if "detected" in det else np.zeros(len(det), bool)
        scored = np.ones(len(det), dtype=bool)
    delay = (pd.to_numeric(det["delay_obs"], errors="coerce").to_numpy(dtype="float64",
                                                                         na_value=np.nan)
             if "delay_obs" in det else np.full(len(det), np.nan))
    delay = np.where(hit, delay, np.nan)
    kind = det["kind"].astype(str).to_numpy() if "kind" in det else np.full(len(det), "all")
    groups = [(k, kind == k) for k in sorted(set(kind))]
    if len(groups) > 1:
        groups.append(("all", np.ones(len(det), dtype=bool)))
    rows = []
    for k, m in groups:
        n_scored, n_hit = int(scored[m].sum()), int(hit[m].sum())
        d = delay[m & hit]
        d = d[np.isfinite(d)]
        rows.append({"kind": k, "change_points": int(m.sum()), "scored": n_scored,
                     "detected": n_hit, "missed": n_scored - n_hit,
                     "detection_rate": n_hit / n_scored if n_scored else np.nan,
                     "median_delay_obs": float(np.median(d)) if d.size else np.nan,
                     "max_delay_obs": float(d.max()) if d.size else np.nan})
    return pd.DataFrame(rows, columns=cols)
