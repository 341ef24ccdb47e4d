"""Groups in a replay: pooled columns in ``estimates.csv`` and group alerts in ``alerts.csv``.

When ``[series] groups`` (``--group-col``) is set, after the replay has written its files:

- ``estimates.csv`` gains ``group``, ``beta_pooled`` and ``beta_pooled_se``: each row's series
  pooled with its group as the group stood at that row's time
  (:func:`monitor.groups.stream.pooled_columns`);
- ``alerts.csv`` gains ``group_change`` rows (series ``group:COLUMN=VALUE``) for changes
  across a group, and a ``group_alert`` column naming, on each folded member row, the group
  alert it belongs to (``group:category=snacks at 2024-03-05T04:00:00Z``)
  (:func:`monitor.groups.grouped.plan_group_alerts`);
- ``attributes.csv`` lists every series with its attributes (key parts and the attributes file).

The files are rewritten in place (read back, extended, written), so the replay itself is
unchanged; this costs one more pass over ``estimates.csv``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv

from monitor.groups.attributes import group_labels, merge_attributes, read_attributes
from monitor.groups.grouped import (GROUP_KIND, group_details, group_message, group_series_id,
                                    plan_group_alerts)
from monitor.groups.keys import key_attributes
from monitor.groups.settings import GroupSettings
from monitor.groups.stream import pooled_columns


def series_attribute_table(series, settings: GroupSettings) -> pd.DataFrame:
    """Attributes of ``series``: key parts (composite keys) merged with the attributes file."""
    key_attrs = key_attributes(series, list(settings.key)) if len(settings.key) > 1 else None
    file_attrs = read_attributes(settings.attributes) if settings.attributes else None
    if key_attrs is None and file_attrs is None:
        return pd.DataFrame({"series": list(dict.fromkeys(series))})
    return merge_attributes(key_attrs, file_attrs, source=str(settings.attributes or "keys"))


def _read_csv(path: Path) -> pd.DataFrame:
    table = pacsv.read_csv(str(path), convert_options=pacsv.ConvertOptions(
        column_types={"series": pa.string(), "ts": pa.string(), "message": pa.string(),
                      "rule": pa.string(), "status": pa.string(), "severity": pa.string()}))
    return table.to_pandas()


def _write_csv(frame: pd.DataFrame, path: Path) -> None:
    tmp = path.with_suffix(".csv.tmp")
    frame.to_csv(tmp, index=False)
    tmp.replace(path)


def apply_groups(out_dir, settings: GroupSettings, names) -> dict:
    """Extend the replay files in ``out_dir`` for groups; returns the summary's ``groups`` block.

    Parameters
    ----------
    names : sequence of str
        Every series the replay saw.
    """
    if not (settings.active or len(settings.key) > 1 or settings.attributes):
        return {}
    out = Path(out_dir)
    attrs = series_attribute_table(list(names), settings)
    attrs.to_csv(out / "attributes.csv", index=False)
    if not settings.active:
        return {"attributes": len(attrs.columns) - 1}
    labels = group_labels(attrs, list(settings.groups))
    group_of = {s: g for s, g in labels.items() if g is not None}
    sizes = pd.Series(list(group_of.values()), dtype=object).value_counts().to_dict()

    est = _read_csv(out / "estimates.csv")
    pooled = pooled_columns(est, group_of)
    for col in ("group", "beta_pooled", "beta_pooled_se"):
        est[col] = pooled[col]
    _write_csv(est, out / "estimates.csv")

    alerts = _read_csv(out / "alerts.csv")
    alerts["group_alert"] = pd.Series([None] * len(alerts), dtype=object)
    cand = pd.DataFrame({"key": np.arange(len(alerts)), "series": alerts["series"].astype(object),
                         "kind": alerts["rule"].astype(object), "ts": alerts["ts"],
                         "beta": alerts["beta"]})
    plans = plan_group_alerts(cand, group_of, sizes, settings.alerts) if len(alerts) else []
    rows = []
    by = list(settings.groups)
    for plan in plans:
        n = int(sizes.get(plan.group, 0))
        gid = group_series_id(plan.group, by)
        label = f"{gid} at {plan.ts}"
        alerts.loc[list(plan.member_keys), "group_alert"] = label
        det = group_details(plan, n, by)
        rows.append({"series": gid, "ts": str(plan.ts), "rule": GROUP_KIND, "beta": plan.beta,
                     "beta_lo": np.nan, "beta_hi": np.nan,
                     "message": group_message(plan, n, by), "severity": "warning",
                     "group_alert": None, "members": len(det["members"])})
    if rows:
        alerts = pd.concat([alerts, pd.DataFrame(rows).drop(columns="members")],
                           ignore_index=True)
        alerts = alerts.sort_values(["ts", "series", "rule"], kind="stable")
    _write_csv(alerts, out / "alerts.csv")
    return {"group_by": by, "groups": int(len(sizes)), "grouped_series": int(len(group_of)),
            "group_alerts": len(rows),
            "folded_alerts": int(sum(len(p.member_keys) for p in plans))}
