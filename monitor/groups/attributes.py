"""Attributes of series (category, region, store, feeder, tariff) and the groups they define.

Attributes come from two places, merged by :func:`merge_attributes`:

- the key parts of composite series ids (:func:`monitor.groups.keys.key_attributes`): a series
  ``rye-crackers/elm-cross`` keyed by ``["sku", "store"]`` has ``sku = rye-crackers`` and
  ``store = elm-cross``;
- an attributes file (CSV, UTF-8): a ``series`` column and one column per attribute, one row per
  series, read by :func:`read_attributes`.

A group is the set of series sharing the values of the group columns (``--group-col category``,
``[series] groups = ["category"]``); its label is those values joined like a series key
(:func:`group_labels`). A series without a value for a group column belongs to no group: it is
reported with its own estimate only, never pooled with a made-up group.

Every problem in a file is reported at once, each message naming the file, the row (1-based
data row, the header not counted), the field, the value and the rule.
"""

from __future__ import annotations

import csv
import re
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import pandas as pd

from monitor.errors import ConfigError, ValidationError
from monitor.groups.keys import join_key

#: An attribute name: a letter, then letters, digits or underscores (it becomes a column name).
NAME_RULE = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
#: Column of the attributes file that names the series.
SERIES_COLUMN = "series"
#: Most problems listed in one message (the count of the rest is given).
MAX_LISTED = 20


def check_attribute_name(name: str, where: str = "attribute") -> str:
    """``name`` unchanged, or :class:`ConfigError` naming it and the rule."""
    if not isinstance(name, str) or not NAME_RULE.match(name):
        raise ConfigError(f"{where} {name!r}: must start with a letter and hold only letters, "
                          f"digits and '_'")
    if name == SERIES_COLUMN:
        raise ConfigError(f"{where} {name!r}: 'series' is the id column, not an attribute")
    return name


def _raise_all(path: str, problems: list[str]) -> None:
    if not problems:
        return
    shown = problems[:MAX_LISTED]
    more = len(problems) - len(shown)
    text = "\n".join(shown) + (f"\n... and {more} more" if more else "")
    raise ValidationError(f"{path}: {len(problems)} problem(s) in the attributes file:\n{text}")


def read_attributes(path: str | Path) -> pd.DataFrame:
    """Read an attributes file: ``series`` plus attribute columns, all values text.

    Rules, each reported as ``FILE row R: field 'F' = 'V': RULE``:

    - the header has a ``series`` column and attribute names that start with a letter and hold
      letters, digits and ``_``, each once;
    - every row has as many fields as the header;
    - ``series`` is not blank and appears once;
    - an attribute value may be blank (the series has no value for it), but not only white space
      around text (leading or trailing spaces would make two spellings of one group).

    Returns
    -------
    pandas.DataFrame
        Columns ``series`` and the attributes (object dtype, ``None`` for a blank value).
    """
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"{p}: attributes file not found")
    try:
        with p.open(newline="", encoding="utf-8") as fh:
            records = list(csv.reader(fh))
    except UnicodeDecodeError as exc:
        raise ValidationError(f"{p}: attributes file is not UTF-8 text ({exc})") from None
    if not records:
        raise ValidationError(f"{p}: attributes file is empty (expected a header with 'series')")
    header, body = [h.strip() for h in records[0]], records[1:]
    problems: list[str] = []
    if SERIES_COLUMN not in header:
        raise ValidationError(f"{p}: header {header}: an attributes file needs a 'series' column")
    seen_cols: set[str] = set()
    for name in header:
        if name in seen_cols:
            problems.append(f"{p} header: field {name!r}: column named twice")
        seen_cols.add(name)
        if name != SERIES_COLUMN and not NAME_RULE.match(name):
            problems.append(f"{p} header: field {name!r}: an attribute name starts with a letter "
                            f"and holds only letters, digits and '_'")
    _raise_all(str(p), problems)
    si = header.index(SERIES_COLUMN)
    rows, first_row = [], {}
    for r, rec in enumerate(body, start=1):
        if not rec or all(not f.strip() for f in rec):
            continue                                  # a blank line is not a row
        if len(rec) != len(header):
            problems.append(f"{p} row {r}: field 'line' = {','.join(rec)!r}: {len(rec)} fields, "
                            f"the header has {len(header)}")
            continue
        sid = rec[si]
        if not sid.strip():
            problems.append(f"{p} row {r}: field 'series' = {sid!r}: series must not be blank")
            continue
        if sid in first_row:
            problems.append(f"{p} row {r}: field 'series' = {sid!r}: series listed twice (first "
                            f"at row {first_row[sid]})")
            continue
        first_row[sid] = r
        bad = False
        for name, value in zip(header, rec):
            if name != SERIES_COLUMN and value != value.strip() and value.strip():
                problems.append(f"{p} row {r}: field {name!r} = {value!r}: no spaces around a "
                                f"value")
                bad = True
        if not bad:
            rows.append([v if (n == SERIES_COLUMN or v.strip()) else None
                         for n, v in zip(header, rec)])
    _raise_all(str(p), problems)
    out = pd.DataFrame(rows, columns=header, dtype=object)
    return out[[SERIES_COLUMN] + [c for c in header if c != SERIES_COLUMN]]


def merge_attributes(key_attrs: pd.DataFrame | None, file_attrs: pd.DataFrame | None,
                     source: str = "attributes file") -> pd.DataFrame:
    """Attributes from key parts and from a file, one row per series.

    A value given by both must agree (a key part is a fact about the id); a disagreement is a
    :class:`ValidationError` naming the series, the attribute and both values. Series only in
    the file keep their file values; series only in the keys keep their key parts.
    """
    frames = [f for f in (key_attrs, file_attrs) if f is not None and len(f.columns)]
    if not frames:
        return pd.DataFrame(columns=[SERIES_COLUMN])
    if len(frames) == 1:
        return frames[0].reset_index(drop=True)
    only_file = file_attrs[~file_attrs[SERIES_COLUMN].isin(key_attrs[SERIES_COLUMN])]
    both = key_attrs.merge(file_attrs, on=SERIES_COLUMN, how="left", sort=False,
                           suffixes=("_key", "_file"))
    both = pd.concat([both, only_file.rename(columns={c: f"{c}_file" for c in only_file.columns
                                                      if c in key_attrs.columns
                                                      and c != SERIES_COLUMN})],
                     ignore_index=True)
    shared = [c for c in key_attrs.columns if c != SERIES_COLUMN and c in file_attrs.columns]
    problems = []
    for col in shared:
        k, f = both[f"{col}_key"], both[f"{col}_file"]
        clash = k.notna() & f.notna() & (k != f)
        for sid, kv, fv in zip(both.loc[clash, SERIES_COLUMN], k[clash], f[clash]):
            problems.append(f"{source}: series {sid!r}: field {col!r} = {fv!r}: disagrees with "
                            f"the key part {kv!r}")
        both[col] = k.where(k.notna(), f)
    _raise_all(source, problems)
    cols = ([SERIES_COLUMN] + [c for c in key_attrs.columns if c != SERIES_COLUMN]
            + [c for c in file_attrs.columns if c != SERIES_COLUMN and c not in key_attrs.columns])
    out = both[cols].reset_index(drop=True)
    return out.astype(object).where(out.notna(), None)


def group_labels(attrs: pd.DataFrame, group_cols: Sequence[str]) -> pd.Series:
    """The group label of each series (index: series), ``None`` where a group value is missing.

    One group column gives its value; several are joined like a key (``snacks/north``).

    >>> a = pd.DataFrame({"series": ["s1", "s2", "s3"], "category": ["tea", "tea", None]})
    >>> group_labels(a, ["category"]).tolist()
    ['tea', 'tea', None]
    """
    cols = list(group_cols)
    if not cols:
        raise ConfigError("groups: at least one group column is needed")
    missing = [c for c in cols if c not in attrs.columns]
    if missing:
        known = [c for c in attrs.columns if c != SERIES_COLUMN]
        raise ConfigError(f"group column(s) {missing}: no such attribute (known: {known}); "
                          f"give them as key columns or in the attributes file")
    values = attrs[cols].to_numpy(dtype=object)
    labels = [None if any(v is None or (isinstance(v, float) and v != v) for v in row)
              else (str(row[0]) if len(cols) == 1 else join_key([str(v) for v in row]))
              for row in values]
    return pd.Series(labels, index=pd.Index(attrs[SERIES_COLUMN], name=SERIES_COLUMN),
                     dtype=object, name="group")


def attributes_long(attrs: pd.DataFrame) -> list[tuple[str, str, str]]:
    """``(series, name, value)`` triples of the non-missing values (the store's table form)."""
    out = []
    cols = [c for c in attrs.columns if c != SERIES_COLUMN]
    for row in attrs.itertuples(index=False):
        d = row._asdict() if hasattr(row, "_asdict") else dict(zip(attrs.columns, row))
        for c in cols:
            v = d.get(c)
            if v is not None and not (isinstance(v, float) and v != v):
                out.append((str(d[SERIES_COLUMN]), c, str(v)))
    return out


def attributes_wide(triples: Iterable[tuple[str, str, str]]) -> pd.DataFrame:
    """The inverse of :func:`attributes_long`: one row per series, one column per name."""
    rows: dict[str, dict] = {}
    names: list[str] = []
    for sid, name, value in triples:
        rows.setdefault(sid, {})[name] = value
        if name not in names:
            names.append(name)
    out = pd.DataFrame([{SERIES_COLUMN: s, **v} for s, v in rows.items()],
                       columns=[SERIES_COLUMN] + names)
    return out.astype(object).where(out.notna(), None)


def attribute_settings(values: Mapping) -> dict:
    """Check ``[series]`` values: ``key`` and ``groups`` lists of names, ``attributes`` a path."""
    key = values.get("key") or []
    groups = values.get("groups") or []
    for name, lst in (("key", key), ("groups", groups)):
        if not isinstance(lst, list) or not all(isinstance(v, str) and v.strip() for v in lst):
            raise ConfigError(f"[series] {name} = {lst!r}: must be a list of column names")
        if len(set(lst)) != len(lst):
            raise ConfigError(f"[series] {name} = {lst!r}: a column is named twice")
    for g in groups:
        check_attribute_name(g, "[series] groups:")
    path = values.get("attributes")
    if path is not None and (not isinstance(path, str) or not path.strip()):
        raise ConfigError(f"[series] attributes = {path!r}: must be a file path")
    return {"key": list(key), "groups": list(groups), "attributes": path}


def group_resolver(group_cols: Sequence[str], key_cols: Sequence[str] = (),
                   file_attrs: pd.DataFrame | None = None):
    """A function ``series -> group label or None`` for series seen or not seen yet.

    A group column that is a key column is read from the series id itself
    (:func:`~monitor.groups.keys.split_key`), so a new series has its group the moment its first
    row arrives; other group columns come from ``file_attrs`` (the attributes file). A series
    whose id does not split into the key's parts, or that lacks a value, has no group.

    >>> f = group_resolver(["store"], ["sku", "store"])
    >>> f("tea/north"), f("no-separator")
    ('north', None)
    """
    from monitor.groups.keys import split_key

    groups, keys = list(group_cols), list(key_cols)
    table: dict[str, dict] = {}
    if file_attrs is not None and len(file_attrs):
        cols = [c for c in file_attrs.columns if c != SERIES_COLUMN]
        for row in file_attrs[[SERIES_COLUMN] + cols].itertuples(index=False):
            table[str(row[0])] = dict(zip(cols, row[1:]))
    for g in groups:
        if g not in keys and not any(g in v for v in table.values()) and g not in (
                file_attrs.columns if file_attrs is not None else ()):
            raise ConfigError(f"group column {g!r}: neither a key column ({keys}) nor a column "
                              f"of the attributes file")

    def resolve(series: str) -> str | None:
        values = dict(table.get(series, {}))
        if any(g in keys for g in groups) and len(keys) > 1:
            try:
                values.update(zip(keys, split_key(series, len(keys))))
            except ValueError:
                return None
        elif len(keys) == 1 and groups and keys[0] in groups:
            values[keys[0]] = series
        vals = [values.get(g) for g in groups]
        if any(v is None or (isinstance(v, float) and v != v) or v == "" for v in vals):
            return None
        return str(vals[0]) if len(vals) == 1 else join_key([str(v) for v in vals])

    return resolve
