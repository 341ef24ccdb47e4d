"""``elmon tune``: run a grid of settings over a log with known changes, score each setting
(false alarms, detection rate, delays), keep the Pareto front, recommend one setting and write
``tuning.csv``, ``recommended.toml``, ``summary.json`` and the report."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.errors import ConfigError
from monitor.settings import Config, default_config
from monitor.tuning.space import (grid, read_space, recommended_config, setting_config,
                                  setting_label, space_from_dict, to_toml)


METRICS = ["false_alarms_per_10k", "detection_rate", "median_delay_obs", "p90_delay_obs",
           "median_delay_all_obs", "median_delay_s", "detected", "changes", "false_alarms",
           "quiet_obs"]


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
    # "counting misses as never detected": the delay the choice uses, which differs from the
    # median over the detected changes printed beside it (issue 16: two medians, no words)
    return best, (f"shortest median delay counting a missed change as never detected "
                  f"({row['median_delay_all_obs']:.3g} observations) among "
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


# --------------------------------------------------------------------------- the command
def phase_printer(enabled: bool, t0: float, stream=None):
    """A function that writes ``tune: <text> [t s]`` lines to ``stream`` (default stderr) as
    each phase of a tuning run starts, or does nothing when ``enabled`` is false.

    >>> import io, time
    >>> buf = io.StringIO()
    >>> phase_printer(True, time.perf_counter(), buf)("reading log.csv")
    >>> buf.getvalue().startswith("tune: reading log.csv [")
    True
    """
    import sys
    import time

    if not enabled:
        return lambda text: None

    def say(text: str) -> None:
        print(f"tune: {text} [{time.perf_counter() - t0:.1f} s]",
              file=stream if stream is not None else sys.stderr, flush=True)
    return say


def tune(log, out_dir, *, truth=None, space=None, config: Config | None = None,
         max_false_alarms: float = 1.0, arl0: float | None = None, horizon: int = 90,
         engine: str = "local", scheduler: str | None = None, npartitions: int | None = None,
         chunk_rows: int | None = None, workers: int | None = None, progress: bool = True,
         now_ns: int | None = None, bootstrap_steps: int | None = None, seed: int = 0) -> dict:
    """``elmon tune``: with ``truth``, the grid search; without, the ARL design check.

    Writes into ``out_dir``: ``tuning.csv`` (one row per setting), ``recommended.toml`` (a
    ready config file), ``tuning.json`` (the summary returned) and ``report.html`` (the
    trade-off plot and tables). Without a truth file see :func:`monitor.tuning.calibrate.calibrate`.
    """
    import json
    import time

    from monitor.replay.detection import read_truth

    t0 = time.perf_counter()
    config = config or default_config()
    out = Path(out_dir)
    if engine not in ("local", "dask"):
        raise ConfigError(f"engine = {engine!r}: must be 'local' or 'dask'")
    if truth is None:
        if arl0 is None:
            raise ConfigError("without --truth, give the target in-control ARL with --arl0 "
                              "(observations per series between false alarms)")
        from monitor.tuning.calibrate import calibrate

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
    from monitor.tuning import grid as R
    from monitor.tuning.rows import load_rows

    say = phase_printer(progress, t0)
    say(f"{len(settings)} settings ({len(settings) - 1} from the search space plus the "
        "defaults); designing each one's chart thresholds by simulation")
    full = R.with_thresholds(config, settings, say=say)
    if engine == "dask":
        say("replaying every setting on the Dask cluster")
        summaries, n_rows = R.evaluate_dask(log, config, truth_df, full, horizon, scheduler,
                                            npartitions, chunk_rows, now_ns, progress)
    else:
        say(f"reading and validating {log}")
        rows = load_rows(log, config, chunk_rows, now_ns)
        n_rows = rows.n
        say(f"{rows.n:,} observations of {len(rows.names):,} series; replaying every setting")
        summaries = R.evaluate_local(rows, truth_df, config, full, horizon, workers, progress)
    res = results_frame(settings, summaries)
    for key in dict.fromkeys(k for f in full for k in f if k[1].endswith(("_h", "_L", "threshold"))):
        res[f"{key[0]}.{key[1]} (used)"] = [f.get(key, np.nan) for f in full]
    res.loc[0, "label"] = "defaults"
    res["pareto"] = pareto_front(res["false_alarms_per_10k"], res["median_delay_all_obs"])
    res["within_budget"] = res["false_alarms_per_10k"].fillna(np.inf) <= max_false_alarms
    best, why = recommend(res, max_false_alarms)
    meets = best is not None and bool(res.loc[best, "within_budget"])
    # one answer in every file: a setting outside the budget is never marked recommended
    # (tuning.csv, tuning.json, report.html and recommended.toml agree; issue 16)
    res["recommended"] = (res.index == best) & meets
    out.mkdir(parents=True, exist_ok=True)
    res.to_csv(out / "tuning.csv", index=False)
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
    from monitor.report.html import write_tuning_report

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
