"""Where an experiment's rows come from: the store (CLI, dashboard) or replay's validated rows.

- :func:`status_from_store` reads the plan's series from ``baseline_start`` to ``end`` through
  the store's query :func:`monitor.store.experiment_observations` (all SQL stays in the store),
  unpacks the controls column and calls :func:`~monitor.experiments.status.evaluate` with the
  stored exposure (the Poisson model's, NULL = none) as the fit's offset.
- :func:`statuses_from_config` does it for every ``[experiments.NAME]`` of a config, with the
  controls of ``[estimator]``.
- :func:`experiments_json` gives the JSON document replay writes as ``experiments.json``;
  :func:`write_experiments_for_log` is replay's one call: it reads the log's rows of the
  experiments' series again and validates them through the shared row path
  (:func:`monitor.rows.validate.validate_frame`, the same settings as the replay), so the
  chunked replay keeps no rows in memory for it.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Sequence

import pandas as pd

from monitor.experiments.plan import ExperimentPlan, plans_from_section
from monitor.experiments.status import ExperimentStatus, evaluate


def unpack_controls(df: pd.DataFrame) -> pd.DataFrame:
    """Spread the store's ``controls`` column (dicts) into one column per control."""
    if "controls" not in df.columns:
        return df
    ctl = pd.DataFrame([c if isinstance(c, dict) else {} for c in df["controls"]],
                       index=df.index)
    ctl = ctl.drop(columns=[c for c in ctl.columns if c in df.columns], errors="ignore")
    return pd.concat([df.drop(columns=["controls"]), ctl], axis=1)


#: the column the store's exposure is read into (not a name a log column would have)
STORED_EXPOSURE = "(stored exposure)"


def status_from_store(store: Any, plan: ExperimentPlan, controls: Sequence[str] = (),
                      log_controls: Sequence[str] = ()) -> ExperimentStatus:
    """The experiment's status from the observations table of ``store`` (a Store or a path)."""
    from monitor import store as mstore

    rows = mstore.experiment_observations(store, list(plan.series), plan.baseline_start,
                                          plan.end)
    # the stored exposure (store migration 11; NULL: none, i.e. 1) under a name no control
    # can have, so a control named "exposure" is not shadowed
    rows = rows.rename(columns={"exposure": STORED_EXPOSURE})
    return evaluate(unpack_controls(rows), plan, controls, log_controls,
                    exposure=STORED_EXPOSURE)


def plans_from_config(cfg: Any) -> dict[str, ExperimentPlan]:
    """``{name: plan}`` of a validated Config's ``[experiments]`` section."""
    return plans_from_section(cfg.section("experiments") or None)


def controls_from_config(cfg: Any) -> tuple[list[str], list[str]]:
    """``(controls, log_controls)`` of ``[estimator]``."""
    est = cfg.section("estimator")
    return list(est.get("controls", [])), list(est.get("log_controls", []))


def exposure_from_config(cfg: Any) -> str:
    """``[estimator] exposure``: the exposure column of the Poisson model, or ``""``."""
    return str(cfg.section("estimator").get("exposure", "") or "")


def statuses_from_frame(frame: pd.DataFrame, cfg: Any) -> list[ExperimentStatus]:
    """Every configured experiment evaluated on validated rows (replay, at the end of a log)."""
    controls, log_controls = controls_from_config(cfg)
    exposure = exposure_from_config(cfg)
    return [evaluate(frame, plan, controls, log_controls, exposure=exposure)
            for plan in plans_from_config(cfg).values()]


def experiments_json(statuses: list[ExperimentStatus]) -> list[dict]:
    """One JSON object per experiment: the summary fields (``elmon experiment status --json``)."""
    return [s.to_json() for s in statuses]


def write_experiments_json(frame: pd.DataFrame, cfg: Any, out_dir: str | Path) -> Path | None:
    """Replay's hook: write ``out_dir/experiments.json`` when ``[experiments]`` is configured
    (None, and nothing written, when it is not)."""
    if not plans_from_config(cfg):
        return None
    path = Path(out_dir) / "experiments.json"
    doc = experiments_json(statuses_from_frame(frame, cfg))
    path.write_text(json.dumps(doc, indent=2, allow_nan=False) + "\n", encoding="utf-8")
    return path


def write_experiments_for_log(log: str | Path, cfg: Any, out_dir: str | Path,
                              now_ns: int | None = None) -> Path | None:
    """Replay's hook: ``out_dir/experiments.json`` for the log ``log`` when ``[experiments]`` is
    configured (None, and nothing read or written, when it is not).

    Only the rows of series that some experiment matches are validated (validation is per
    series, so their verdicts are those of the whole log).
    """
    import time

    from monitor.ingest.logio import read_log
    from monitor.rows.validate import validate_frame
    from monitor.rows.validate import validation_from_config

    plans = plans_from_config(cfg)
    if not plans:
        return None
    frame = read_log(log, cfg.section("columns"))
    names = pd.unique(frame["series"].astype(str))
    keep = {n for n in names if any(p.matches(n) for p in plans.values())}
    frame = frame[frame["series"].astype(str).isin(keep)].reset_index(drop=True)
    controls, log_controls = controls_from_config(cfg)
    exposure = exposure_from_config(cfg)          # checked as the replay checks it
    v = validate_frame(frame, controls=controls,
                       log_controls=log_controls + ([exposure] if exposure else []),
                       exposure=exposure,
                       settings=validation_from_config(cfg),
                       now_ns=time.time_ns() if now_ns is None else now_ns)
    return write_experiments_json(v.good, cfg, out_dir)
