"""Groups of series: composite keys, attributes, partial pooling and grouped alerts.

- :mod:`monitor.groups.keys`: several key columns joined into one series id (``/``, escaped)
  and split back;
- :mod:`monitor.groups.attributes`: attributes from key parts or an attributes file; group labels;
- :mod:`monitor.groups.pooling`: empirical-Bayes shrinkage of each series' b toward its group
  mean (DerSimonian & Laird 1986; Efron & Morris 1975), the group mean with its band, and the
  series that differ from their group (Benjamini & Hochberg 1995);
- :mod:`monitor.groups.stream`: the same pooling along an estimate history (replay);
- :mod:`monitor.groups.grouped`: one ``group_change`` alert for a change across a group;
- :mod:`monitor.groups.settings`: the ``[series]`` configuration section.

Pure computations: no SQL, files only in :func:`~monitor.groups.attributes.read_attributes`.
"""

from monitor.groups.attributes import group_labels, merge_attributes, read_attributes
from monitor.groups.grouped import GROUP_KIND, GroupAlertSettings, plan_group_alerts
from monitor.groups.keys import SEPARATOR, compose_series, join_key, key_attributes, split_key
from monitor.groups.pooling import bh_reject, dl_tau2, pool_group, pool_snapshot
from monitor.groups.settings import SERIES_SECTION, GroupSettings, group_settings
from monitor.groups.stream import pooled_columns

__all__ = ["GROUP_KIND", "SEPARATOR", "SERIES_SECTION", "GroupAlertSettings", "GroupSettings",
           "bh_reject", "compose_series", "dl_tau2", "group_labels", "group_settings",
           "join_key", "key_attributes", "merge_attributes", "plan_group_alerts",
           "pool_group", "pool_snapshot", "pooled_columns", "read_attributes", "split_key"]
