"""The ``[series]`` configuration section: composite keys, groups, attributes, pooling, group
alerts.

::

    [series]
    key = ["sku", "store"]          # key columns, joined with "/" into the series id
    groups = ["category"]           # attributes whose values define the groups
    attributes = "attributes.csv"   # optional: series + attribute columns
    fdr = 0.05                      # false-discovery rate of the "differs from its group" flags
    group_min_members = 3           # group alert: fewest member series with a change alert
    group_min_fraction = 0.5        #   ... and at least this fraction of the group
    group_window_s = 604800         #   ... opened within this many data-time seconds
    group_hold_s = 300              # live: member notifications wait this long for a group

The section schema (:data:`SERIES_SECTION`) is registered by :mod:`monitor.settings`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from monitor.errors import ConfigError
from monitor.groups.attributes import check_attribute_name
from monitor.groups.grouped import GroupAlertSettings
from monitor.groups.keys import check_key_columns

#: ``[series]`` keys: name -> (type, default), in the form :func:`monitor.settings.register_section` takes.
SERIES_SECTION: dict[str, tuple[Any, Any]] = {
    "key": (list, []), "groups": (list, []), "attributes": (str, None),
    "fdr": ((int, float), 0.05), "group_min_members": (int, 3),
    "group_min_fraction": ((int, float), 0.5), "group_window_s": ((int, float), 7 * 86400.0),
    "group_hold_s": ((int, float), 300.0),
}


@dataclass(frozen=True)
class GroupSettings:
    """Validated ``[series]`` settings (see the module docstring).

    ``key`` empty means the log's single series column; ``groups`` empty means no pooling and no
    group alerts.
    """

    key: tuple[str, ...] = ()
    groups: tuple[str, ...] = ()
    attributes: str | None = None
    fdr: float = 0.05
    alerts: GroupAlertSettings = field(default_factory=GroupAlertSettings)

    @property
    def active(self) -> bool:
        """True when groups are set (pooled columns, group views and group alerts on)."""
        return bool(self.groups)


def _names(value: Any, key: str) -> tuple[str, ...]:
    if value is None:
        return ()
    if not isinstance(value, (list, tuple)) or not all(isinstance(v, str) for v in value):
        raise ConfigError(f"[series] {key} = {value!r}: must be a list of column names")
    return tuple(value)


def group_settings(section: Mapping[str, Any], base_dir: str | Path | None = None) -> GroupSettings:
    """:class:`GroupSettings` from a ``[series]`` table (defaults filled for missing keys).

    A relative ``attributes`` path is taken from ``base_dir`` (the config file's folder).
    Every error is a :class:`~monitor.errors.ConfigError` naming the key and the value.
    """
    sec = {k: d for k, (_, d) in SERIES_SECTION.items()}
    sec.update({k: v for k, v in section.items() if v is not None})
    unknown = [k for k in section if k not in SERIES_SECTION]
    if unknown:
        raise ConfigError(f"[series] {unknown[0]}: unknown key (known: {', '.join(SERIES_SECTION)})")
    key = _names(sec["key"], "key")
    groups = _names(sec["groups"], "groups")
    if key:
        try:
            check_key_columns(key)
        except ValueError as exc:
            raise ConfigError(f"[series] key = {list(key)!r}: {exc}") from None
    if len(set(groups)) != len(groups):
        raise ConfigError(f"[series] groups = {list(groups)!r}: a column is named twice")
    for g in groups:
        check_attribute_name(g, "[series] groups:")
    path = sec["attributes"]
    if path is not None:
        if not isinstance(path, str) or not path.strip():
            raise ConfigError(f"[series] attributes = {path!r}: must be a file path")
        p = Path(path)
        if base_dir is not None and not p.is_absolute():
            p = Path(base_dir) / p
        path = str(p)
    fdr = float(sec["fdr"])
    if not 0.0 < fdr < 1.0:
        raise ConfigError(f"[series] fdr = {fdr!r}: must be in (0, 1)")
    try:
        alerts = GroupAlertSettings(min_members=int(sec["group_min_members"]),
                                    min_fraction=float(sec["group_min_fraction"]),
                                    window_s=float(sec["group_window_s"]),
                                    hold_s=float(sec["group_hold_s"]))
    except ValueError as exc:
        raise ConfigError(f"[series] group_{exc}") from None
    return GroupSettings(key=key, groups=groups, attributes=path, fdr=fdr, alerts=alerts)
