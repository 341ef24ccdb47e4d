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
Import from the defining modules (this file imports nothing, so the row path's use of
:mod:`monitor.groups.keys` does not load scipy).
"""
