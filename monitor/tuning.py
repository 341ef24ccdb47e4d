"""Threshold tuning against known changes: a grid of settings replayed over one log.

``tune(log, truth, space, out_dir, max_false_alarms=...)`` validates the log once, then runs
the pipeline (estimator, detectors, rules) over it for every setting of the search space and
scores the opened alerts against the truth (:mod:`monitor.detection`). Settings run in
parallel on all local cores (:mod:`monitor.tuning_run`), or on a Dask cluster with the series
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
import pandas as pd

import monitor.pipeline_settings  # noqa: F401  (registers [detectors], [bounds], [rules])
from monitor.config import Config, validate
from monitor.config import read_toml
from monitor.errors import ConfigError

MAX_SETTINGS = 5000
METRICS = ["false_alarms_per_10k", "detection_rate", "median_delay_obs", "p90_delay_obs",
           "median_delay_all_obs", "median_delay_s", "detected", "changes", "false_alarms",
           "quiet_obs"]


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


def pareto_front(fa, delay) -> np.ndarray:
    """Mask of non-dominated points when both ``fa`` and ``delay`` are to be minimized.

    A point is dominated when another is no worse on both and better on one. NaN counts as
    +inf (worst). Equal points do not dominate each other.

    >>> pareto_front([1, 2, 3, 1], [5, 4, 4, 6]).tolist()
    [True, True, False, False]
    """
    f = np.nan_to_num(np.asarray(fa, dtype=float), nan=np.inf)
    d = np.nan_to_num(np.asarray(delay, dtype=float), nan=np.inf)
    n = f.size
    keep = np.ones(n, dtype=bool)
    for start in range(0, n, 512):
        fs, ds = f[start:start + 512, None], d[start:start + 512, None]
        no_worse = (f[None, :] <= fs) & (d[None, :] <= ds)
        better = (f[None, :] < fs) | (d[None, :] < ds)
        keep[start:start + 512] = ~(no_worse & better).any(axis=1)
    return keep


def recommend(results: pd.DataFrame, budget: float) -> tuple[int | None, str]:
    """Index (row label) of the recommended setting and a sentence saying why."""
    fa = results["false_alarms_per_10k"].astype(float).fillna(np.inf)
    ok = results[fa <= budget]
    if not len(ok):
        best = fa.idxmin() if np.isfinite(fa.min()) else None
        return best, (f"no setting meets the budget of {budget:g} false alarms per 10,000 "
                      f"observations; the lowest rate is {fa.min():.3g} (shown, not recommended)")
    key = pd.DataFrame({
        "d": ok["median_delay_all_obs"].astype(float).fillna(np.inf),
        "r": -ok["detection_rate"].astype(float).fillna(0.0),
        "f": ok["false_alarms_per_10k"].astype(float),
        "p": ok["p90_delay_obs"].astype(float).fillna(np.inf),
        "i": np.arange(len(ok))}, index=ok.index)
    best = key.sort_values(["d", "r", "f", "p", "i"], kind="stable").index[0]
    row = results.loc[best]
    if not np.isfinite(key.loc[best, "d"]):
        return best, ("every setting within the budget misses at least half of the known "
                      "changes; this one detects the most of them")
    return best, (f"shortest median delay ({row['median_delay_all_obs']:.3g} observations) among "
                  f"{len(ok)} of {len(results)} settings within {budget:g} false alarms per "
                  "10,000 observations")


def results_frame(settings: list[dict], summaries: list[dict]) -> pd.DataFrame:
    """One row per setting: its values (columns ``section.key``) and the detection metrics."""
    rows = []
    for i, (s, m) in enumerate(zip(settings, summaries)):
        row = {"setting": i, "label": setting_label(s)}
        row.update({f"{sec}.{key}": v for (sec, key), v in s.items()})
        row.update({k: (np.nan if m.get(k) is None else m[k]) for k in METRICS})
        rows.append(row)
    return pd.DataFrame(rows)


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


# --------------------------------------------------------------------------- the command
def tune(log, out_dir, *, truth=None, space=None, config: Config | None = None,
         max_false_alarms: float = 1.0, arl0: float | None = None, horizon: int = 90,
         engine: str = "local", scheduler: str | None = None, npartitions: int | None = None,
         chunk_rows: int | None = None, workers: int | None = None, progress: bool = True,
         now_ns: int | None = None, bootstrap_steps: int | None = None, seed: int = 0) -> dict:
    """``elmon tune``: with ``truth``, the grid search; without, the ARL design check.

    Writes into ``out_dir``: ``tuning.csv`` (one row per setting), ``recommended.toml`` (a
    ready config file), ``tuning.json`` (the summary returned) and ``report.html`` (the
    trade-off plot and tables). Without a truth file see :func:`monitor.calibration.calibrate`.
    """
    import json
    import time

    from monitor.detection import read_truth

    t0 = time.perf_counter()
    config = config or Config()
    out = Path(out_dir)
    if engine not in ("local", "dask"):
        raise ConfigError(f"engine = {engine!r}: must be 'local' or 'dask'")
    if truth is None:
        if arl0 is None:
            raise ConfigError("without --truth, give the target in-control ARL with --arl0 "
                              "(observations per series between false alarms)")
        from monitor.calibration import calibrate

        return calibrate(log, out, config=config, arl0=arl0, chunk_rows=chunk_rows, now_ns=now_ns,
                         n_steps=bootstrap_steps, seed=seed, progress=progress)
    if space is None:
        raise ConfigError("give the search space with --space SPACE.toml")
    if not max_false_alarms >= 0:
        raise ConfigError(f"--max-false-alarms {max_false_alarms!r}: must be >= 0")
    truth_df = read_truth(truth)
    sp = read_space(space) if not isinstance(space, dict) else space_from_dict(space)
    settings = [{}] + grid(sp)
    for s in settings:
        setting_config(config, s, str(space))          # refuse bad keys before any work
    from monitor import tuning_run as R

    full = R.with_thresholds(config, settings)
    if engine == "dask":
        summaries, n_rows = R.evaluate_dask(log, config, truth_df, full, horizon, scheduler,
                                            npartitions, chunk_rows, now_ns, progress)
    else:
        rows = R.load_rows(log, config, chunk_rows, now_ns)
        n_rows = rows.n
        summaries = R.evaluate_local(rows, truth_df, config, full, horizon, workers, progress)
    res = results_frame(settings, summaries)
    for key in dict.fromkeys(k for f in full for k in f if k[1].endswith(("_h", "_L", "threshold"))):
        res[f"{key[0]}.{key[1]} (used)"] = [f.get(key, np.nan) for f in full]
    res.loc[0, "label"] = "defaults"
    res["pareto"] = pareto_front(res["false_alarms_per_10k"], res["median_delay_all_obs"])
    res["within_budget"] = res["false_alarms_per_10k"].fillna(np.inf) <= max_false_alarms
    best, why = recommend(res, max_false_alarms)
    res["recommended"] = res.index == best if best is not None else False
    out.mkdir(parents=True, exist_ok=True)
    res.to_csv(out / "tuning.csv", index=False)
    meets = best is not None and bool(res.loc[best, "within_budget"])
    rec = settings[best] if meets else None
    if rec is not None:
        used = ", ".join(f"{k} = {v:.6g}" for (s_, k), v in full[best].items() if (s_, k) not in rec)
        header = (f"elmon tune: recommended setting for at most {max_false_alarms:g} false alarms "
                  f"per 10,000 observations\n{why}\nsearch space: {space}; log: {log}; truth: {truth}"
                  f"\nthresholds designed for it during tuning: {used or 'none'}")
        (out / "recommended.toml").write_text(to_toml(recommended_config(config, rec), header))
    elapsed = time.perf_counter() - t0
    summary = {
        "log": str(log), "truth": str(truth), "space": str(space), "engine": engine,
        "max_false_alarms_per_10k": max_false_alarms, "settings": len(settings),
        "observations": n_rows, "recommended": None if rec is None else {
            "setting": int(best), "label": res.loc[best, "label"],
            "values": {f"{s}.{k}": v for (s, k), v in rec.items()},
            **{m: _num(res.loc[best, m]) for m in METRICS}},
        "reason": why, "defaults": {m: _num(res.loc[0, m]) for m in METRICS},
        "pareto": [int(i) for i in np.flatnonzero(res["pareto"].to_numpy())],
        "timing": {"wall_s": elapsed,
                   "setting_observations_per_s": len(settings) * n_rows / elapsed if elapsed else None},
        "horizon_obs": horizon}
    (out / "tuning.json").write_text(json.dumps(summary, indent=2, sort_keys=True, default=_num))
    from monitor.report import write_tuning_report

    write_tuning_report(out / "report.html", summary, res)
    return summary


def _num(v):
    if isinstance(v, (np.bool_, bool)):
        return bool(v)
    if isinstance(v, (np.integer,)):
        return int(v)
    try:
        f = float(v)
    except (TypeError, ValueError):
        return str(v)
    return f if math.isfinite(f) else None
