"""Threshold tuning against known changes: a grid of settings replayed over one log.

``tune(log, truth, space, out_dir, max_false_alarms=...)`` validates the log once, then runs
the pipeline (estimator, detectors, rules) over it for every setting of the search space and
scores the opened alerts against the truth (:mod:`monitor.replay.detection`). Settings run in
parallel on all local cores (:mod:`monitor.tuning.grid`), or on a Dask cluster with the series
partitioned over the workers; both give the same numbers.

Search space (TOML): config sections and keys, each with a list of values to try (a single
value fixes it); the grid is every combination, in the order written::

    [estimator]
    forgetting = [0.97, 0.98, 0.99]
    [detectors]
    arl0 = [2000, 20000]
    slope_k = [0.5, 1.0]
    [bounds]
    persistence = [2, 3]

Every combination is checked like a config file (unknown keys and bad values are refused by
name). The configuration given with ``--config`` is the base each setting changes, and is
itself scored as the ``defaults`` row.

Ranking: a setting is within budget when its false alarms per 10,000 quiet observations are
at most ``max_false_alarms``. The recommendation is the setting within budget with the
shortest median delay counting a missed change as an infinite delay
(``median_delay_all_obs``: a setting cannot look fast by catching only the easy changes), then
the higher detection rate, the fewer false alarms, the shorter 90th-percentile delay, and the
earlier grid position. The Pareto front is the set of settings that no other setting beats on
both the false-alarm rate and that median delay (:func:`pareto_front`).
"""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import numpy as np

from monitor.errors import ConfigError
from monitor.settings import Config, read_toml, validate


MAX_SETTINGS = 5000


def read_space(path) -> dict[str, dict[str, list]]:
    """The search space of a TOML file: ``{section: {key: [values]}}`` (scalars become lists)."""
    return space_from_dict(read_toml(path, "search space file"), str(Path(path)))


def space_from_dict(data: dict, source: str = "space") -> dict[str, dict[str, list]]:
    space: dict[str, dict[str, list]] = {}
    for section, keys in data.items():
        if not isinstance(keys, dict):
            raise ConfigError(f"{source}: [{section}] must be a table of key = [values]")
        space[section] = {}
        for key, values in keys.items():
            vals = values if isinstance(values, list) else [values]
            if not vals:
                raise ConfigError(f"{source}: [{section}] {key} = []: give at least one value")
            space[section][key] = vals
    return space


def grid(space: dict[str, dict[str, list]]) -> list[dict[tuple[str, str], object]]:
    """Every combination, as ``{(section, key): value}``, in the order written."""
    axes = [((s, k), v) for s, keys in space.items() for k, v in keys.items()]
    n = math.prod(len(v) for _, v in axes) if axes else 1
    if n > MAX_SETTINGS:
        raise ConfigError(f"the search space has {n:,} settings; at most {MAX_SETTINGS:,} "
                          "(fix some keys to one value)")
    names = [a for a, _ in axes]
    return [dict(zip(names, combo)) for combo in itertools.product(*[v for _, v in axes])]


def setting_config(base: Config, setting: dict, source: str = "space") -> Config:
    """``base`` with the setting's values, checked as a config file would be."""
    data = {s: dict(v) if isinstance(v, dict) else v for s, v in base.data.items()}
    for (section, key), value in setting.items():
        data.setdefault(section, {})[key] = value
    where = ", ".join(f"[{s}] {k} = {v!r}" for (s, k), v in setting.items())
    try:
        return validate(data, f"{source} setting {where}" if where else source)
    except ConfigError:
        raise
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"{source} setting {where}: {exc}") from None


def setting_label(setting: dict) -> str:
    return ", ".join(f"{k}={v}" for (_, k), v in setting.items()) or "defaults"


# --------------------------------------------------------------------------- TOML writer

def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        v = float(v)
        if math.isnan(v):
            return "nan"
        return ("inf" if v > 0 else "-inf") if math.isinf(v) else repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise ConfigError(f"cannot write {v!r} ({type(v).__name__}) to TOML")


def to_toml(data: dict, header: str = "") -> str:
    """TOML text of a config dict (tables of scalars and lists; arrays of tables as [[name]]).

    Keys whose value is None (an unset optional key) are left out.

    >>> print(to_toml({"estimator": {"forgetting": 0.98, "controls": ["promo"]}}))
    [estimator]
    forgetting = 0.98
    controls = ["promo"]
    <BLANKLINE>
    """
    out = [f"# {line}" if line else "#" for line in header.splitlines()]
    if out:
        out.append("")
    for section, content in data.items():
        if isinstance(content, list) and all(isinstance(t, dict) for t in content):
            for table in content:
                out.append(f"[[{section}]]")
                out += [f"{k} = {_toml_value(v)}" for k, v in table.items() if v is not None]
                out.append("")
            continue
        if not isinstance(content, dict):
            raise ConfigError(f"cannot write section {section!r} to TOML")
        out.append(f"[{section}]")
        out += [f"{k} = {_toml_value(v)}" for k, v in content.items() if v is not None]
        out.append("")
    return "\n".join(out)


def recommended_config(base: Config, setting: dict) -> dict:
    """The base config's data with the setting applied (what recommended.toml holds)."""
    data = {s: dict(v) if isinstance(v, dict) else v for s, v in base.data.items()}
    for (section, key), value in setting.items():
        data.setdefault(section, {})[key] = value
    return data


