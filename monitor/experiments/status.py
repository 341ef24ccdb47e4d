"""One experiment's status from its observations: estimate, bands, time to precision, verdict.

:func:`evaluate` takes validated observation rows (a frame with ``series, ts, price, quantity``
and the control columns) and an :class:`~monitor.experiments.plan.ExperimentPlan`, and returns an
:class:`ExperimentStatus`. It does no I/O: the CLI and the dashboard read the rows from the store
(``monitor.store.experiment_observations``), replay passes its validated rows.

Verdict, first match wins:

- ``compromised``: a health check failed (prices off the ladder, levels unbalanced across
  weekdays or series, price feedback) or the confidence sequence has ruled out every value of b
  (the constant-b model does not fit the test);
- ``precise``: the confidence-sequence half-width is at or under ``target_halfwidth``;
- ``stalled``: prices are not moving as planned (half or more of the series flat over the last
  ``stall_window`` observations, or no information on b is being gained);
- ``collecting``: otherwise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import pandas as pd

from monitor.errors import ConfigError
from monitor.experiments import health as mhealth
from monitor.experiments.heterogeneity import heterogeneity
from monitor.experiments.plan import ExperimentPlan
from monitor.experiments.pooled import design_matrix, pooled_path, series_fits
from monitor.experiments.precision import cadence_seconds, eta_timestamp, observations_to_target
from monitor.experiments.sequence import cs_radius, fixed_radius, running_intersection

VERDICTS = ("collecting", "precise", "stalled", "compromised")
#: the fields of ``elmon experiment status --json`` and of replay's experiments.json
SUMMARY_FIELDS = ("name", "b", "b_lo", "b_hi", "cs_lo", "cs_hi", "n_obs", "halfwidth",
                  "target_halfwidth", "eta_obs", "eta_ts", "verdict", "reasons")


def _num(v: Any) -> float | None:
    """A finite float, or None (JSON null) for NaN / inf / missing."""
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _iso(ts: Any) -> str | None:
    if ts is None or (isinstance(ts, float) and math.isnan(ts)) or pd.isna(ts):
        return None
    return pd.Timestamp(ts).tz_convert("UTC").strftime("%Y-%m-%dT%H:%M:%SZ")


@dataclass
class ExperimentStatus:
    """Everything known about one experiment at its newest observation.

    ``summary`` holds :data:`SUMMARY_FIELDS` (JSON-able: floats or None, ISO text times);
    ``series`` one row per series (own b, fixed band, confidence sequence, n);
    ``heterogeneity`` the spread of the series' b; ``health`` each check's numbers;
    ``path`` the pooled fit after every observation (``ts, n, b, b_lo, b_hi, cs_lo, cs_hi,
    halfwidth``) for the charts.
    """

    summary: dict
    series: pd.DataFrame
    heterogeneity: dict
    health: dict
    path: pd.DataFrame
    plan: ExperimentPlan
    notes: list[str] = field(default_factory=list)

    def to_json(self, details: bool = False) -> dict:
        """The summary, plus per-series rows, heterogeneity and health when ``details``."""
        out = dict(self.summary)
        if details:
            out["level"] = self.plan.level
            out["series"] = [{k: (_num(v) if isinstance(v, (float, np.floating)) else
                                  int(v) if isinstance(v, (np.integer,)) else v)
                              for k, v in row.items()} for row in self.series.to_dict("records")]
            out["heterogeneity"] = {k: (_num(v) if isinstance(v, (float, np.floating)) else v)
                                    for k, v in self.heterogeneity.items()}
            out["health"] = _plain(self.health)
            out["notes"] = list(self.notes)
            out["plan"] = self.plan.as_dict()
        return out


def _plain(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {k: _plain(v) for k, v in obj.items() if not isinstance(v, np.ndarray)}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return _num(obj)
    return obj


def select_rows(frame: pd.DataFrame, plan: ExperimentPlan) -> pd.DataFrame:
    """Rows of the plan's series from ``baseline_start`` to ``end``, ``ts`` as UTC datetimes,
    sorted by time then series."""
    df = frame.copy()
    df["ts"] = pd.to_datetime(df["ts"], utc=True)
    names = pd.unique(df["series"])
    keep = {s for s in names if plan.matches(str(s))}
    df = df[df["series"].isin(keep)]
    df = df[df["ts"] >= plan.baseline_start]
    if plan.end is not None:
        df = df[df["ts"] <= plan.end]
    return df.sort_values(["ts", "series"], kind="stable").reset_index(drop=True)


def _controls(df: pd.DataFrame, controls: Sequence[str], log_controls: Sequence[str]):
    cols = []
    for name in controls:
        cols.append(pd.to_numeric(df[name], errors="coerce").to_numpy(np.float64))
    for name in log_controls:
        with np.errstate(invalid="ignore", divide="ignore"):
            cols.append(np.log(pd.to_numeric(df[name], errors="coerce").to_numpy(np.float64)))
    return np.column_stack(cols) if cols else None


def _reference_prices(base: pd.DataFrame, names: list[str], test: pd.DataFrame,
                      plan: ExperimentPlan, notes: list[str]) -> np.ndarray:
    """Pre-test price per series: the median baseline price, else (with a note) the median test
    price over the median ladder multiplier."""
    med = base.groupby("series")["price"].median()
    ref = med.reindex(names).to_numpy(np.float64).copy()
    missing = ~np.isfinite(ref)
    if missing.any():
        mult = float(np.median(plan.ladder)) if plan.ladder and plan.ladder_kind == "multipliers" \
            else 1.0
        fallback = (test.groupby("series")["price"].median().reindex(names) / mult).to_numpy(float)
        ref[missing] = fallback[missing]
        if plan.ladder is not None and plan.ladder_kind == "multipliers":
            notes.append(f"{int(missing.sum())} series have no observation in the "
                         f"{plan.baseline_days:g} days before start: their pre-test price is "
                         f"taken as the median test price over the median ladder multiplier")
    return ref


def evaluate(frame: pd.DataFrame, plan: ExperimentPlan, controls: Sequence[str] = (),
             log_controls: Sequence[str] = (), feedback: bool = True,
             exposure: str = "") -> ExperimentStatus:
    """The experiment's status from observation rows (see the module docstring).

    Parameters
    ----------
    frame : DataFrame
        ``series, ts, price, quantity`` and the control columns; other series and times are
        ignored. Rows with a non-positive price or quantity or a missing control are left out
        and counted in a note.
    plan : ExperimentPlan
    controls, log_controls : list of str
        Control columns entered as they are and as their logarithm (as ``[estimator]``).
    feedback : bool
        Run the price-feedback diagnostic (:func:`~monitor.experiments.health.feedback_check`)
        when this installation has it; its failure compromises the test.
    exposure : str
        Column of the exposure behind each quantity (the Poisson model's ``[estimator]
        exposure``: opening hours, customers, meters), or ``""``. The fit is then of the
        quantity per unit of exposure, ``log q - log e`` (the model's offset); a missing
        value (NULL in the store: no exposure) is 1, a value not > 0 leaves the row out.
    """
    notes: list[str] = []
    alpha = 1.0 - plan.level
    rows = select_rows(frame, plan)
    base = rows[rows["ts"] < plan.start]
    test = rows[rows["ts"] >= plan.start].reset_index(drop=True)
    if not len(test):
        controls, log_controls = (), ()     # nothing to check yet
    for name in list(controls) + list(log_controls):
        if name not in test.columns:
            raise ConfigError(f"control {name!r}: not a column of the observations "
                              f"(columns: {', '.join(map(str, test.columns))})")
    z = _controls(test, controls, log_controls)
    with np.errstate(invalid="ignore", divide="ignore"):
        logp = np.log(test["price"].to_numpy(np.float64))
        logq = np.log(test["quantity"].to_numpy(np.float64))
        if exposure and exposure in test.columns:
            e = pd.to_numeric(test[exposure], errors="coerce").to_numpy(np.float64)
            logq = logq - np.log(np.where(np.isnan(e), 1.0, e))
    good = np.isfinite(logp) & np.isfinite(logq)
    if z is not None:
        good &= np.isfinite(z).all(axis=1)
    if (~good).any():
        notes.append(f"{int((~good).sum())} rows left out: price or quantity not > 0, or a "
                     f"control missing")
        test, logp, logq = test[good].reset_index(drop=True), logp[good], logq[good]
        z = None if z is None else z[good]
    names = sorted(pd.unique(test["series"]).tolist())
    n = len(test)
    if n == 0:
        summary = {"name": plan.name, "b": None, "b_lo": None, "b_hi": None, "cs_lo": None,
                   "cs_hi": None, "n_obs": 0, "halfwidth": None,
                   "target_halfwidth": plan.target_halfwidth, "eta_obs": None, "eta_ts": None,
                   "verdict": "collecting", "reasons": ["no observations in the experiment "
                                                        "window yet"]}
        return ExperimentStatus(summary, pd.DataFrame(), {}, {}, pd.DataFrame(), plan, notes)
    codes = pd.Categorical(test["series"], categories=names).codes.astype(np.int64)
    w = design_matrix(logp, z, logq)
    path = pooled_path(codes, w)
    se = path.se
    t_fix = fixed_radius(path.df, plan.level)
    r_cs = cs_radius(path.info, path.df, alpha, plan.cs_precision)
    with np.errstate(invalid="ignore"):
        b_lo, b_hi = path.b - t_fix * se, path.b + t_fix * se
        raw_lo, raw_hi = path.b - r_cs * se, path.b + r_cs * se
    cs_lo, cs_hi = running_intersection(raw_lo, raw_hi)
    half = r_cs * se

    # per series: own intercept and controls
    fits = series_fits(codes, w, len(names))
    with np.errstate(invalid="ignore", divide="ignore"):
        s_se = fits["sigma"] / np.sqrt(fits["info"])
    s_fix = fixed_radius(fits["df"], plan.level)
    s_cs = cs_radius(fits["info"], fits["df"], alpha, plan.cs_precision)
    series = pd.DataFrame({"series": names, "n_obs": fits["n"].astype(np.int64), "b": fits["b"],
                           "se": s_se, "b_lo": fits["b"] - s_fix * s_se,
                           "b_hi": fits["b"] + s_fix * s_se, "cs_lo": fits["b"] - s_cs * s_se,
                           "cs_hi": fits["b"] + s_cs * s_se})
    het = heterogeneity(fits["b"], s_se, plan.level)

    # time to precision from the newest look
    k = w.shape[1] - 2
    n_params = len(names) + k + 1
    info_rate = path.info[-1] / n if np.isfinite(path.info[-1]) else np.nan
    m = observations_to_target(n, path.sigma[-1], info_rate, n_params, plan.target_halfwidth,
                               alpha, plan.cs_precision)[()]
    eta_obs = float(max(0.0, m - n)) if np.isfinite(m) else None
    ts_s = ((test["ts"] - pd.Timestamp(0, tz="UTC")) / pd.Timedelta(seconds=1)).to_numpy(float)
    cad = cadence_seconds(codes, ts_s, len(names))
    last_ts = test["ts"].iloc[-1]
    eta_ts = eta_timestamp(last_ts, eta_obs, cad) if eta_obs is not None else None

    # health
    ref = _reference_prices(base, names, test, plan, notes)
    price = test["price"].to_numpy(np.float64)
    lad = mhealth.ladder_check(price, ref[codes], plan.ladder, plan.ladder_kind,
                               plan.ladder_tolerance, plan.max_off_ladder)
    levels = mhealth.price_levels(logp - np.log(ref[codes]), lad["rung"])
    weekday = test["ts"].dt.day_of_week.to_numpy()
    by_day = mhealth.balance_check(levels, weekday, "weekdays")
    by_series = mhealth.balance_check(levels, codes, "series")
    stall = mhealth.stall_check(codes, logp, names, plan.stall_window)
    checks = {"ladder": lad, "weekday_balance": by_day, "series_balance": by_series}
    if feedback:
        checks["price_feedback"] = mhealth.feedback_check(codes, logp, path.innovation, names)
    else:
        checks["price_feedback"] = {"ok": True, "reason": "", "note": "not run"}
    health = {**checks, "stall": stall}

    # verdict
    hw = float(half[-1])
    fail = [c["reason"] for c in checks.values() if not c["ok"]]
    crossed = bool(cs_lo[-1] > cs_hi[-1])
    if crossed:
        fail.append("the confidence sequence has ruled out every value of b: one constant "
                    "elasticity does not fit this test (did b change, or the design?)")
    if fail:
        verdict, reasons = "compromised", fail
    elif math.isfinite(hw) and hw <= plan.target_halfwidth:
        verdict = "precise"
        reasons = [f"half-width {hw:.3f} <= target {plan.target_halfwidth:g}: precise enough "
                   f"to stop (valid at any look)"]
    elif stall["share"] >= 0.5 or (n > n_params + 2 and eta_obs is None):
        verdict = "stalled"
        who = ", ".join(stall["stalled_series"][:5])
        reasons = [f"prices are not moving as planned: {len(stall['stalled_series'])} of "
                   f"{len(names)} series flat over their last {plan.stall_window} observations"
                   + (f" ({who})" if who else "")] if stall["stalled_series"] else \
                  ["no information on b is being gained: prices do not vary"]
    else:
        verdict = "collecting"
        hw_txt = "not yet bounded" if not math.isfinite(hw) else f"{hw:.3f}"
        eta_txt = "unknown" if eta_obs is None else \
            f"about {eta_obs:.0f} more observations" + \
            (f" (around {_iso(eta_ts)[:10]})" if eta_ts is not None else "")
        reasons = [f"half-width {hw_txt} > target {plan.target_halfwidth:g}; {eta_txt}"]
    if stall["stalled_series"] and verdict != "stalled":
        notes.append(f"flat prices lately in: {', '.join(stall['stalled_series'][:5])}")

    summary = {"name": plan.name, "b": _num(path.b[-1]), "b_lo": _num(b_lo[-1]),
               "b_hi": _num(b_hi[-1]),
               "cs_lo": None if crossed else _num(cs_lo[-1]),
               "cs_hi": None if crossed else _num(cs_hi[-1]),
               "n_obs": int(n), "halfwidth": _num(hw), "target_halfwidth": plan.target_halfwidth,
               "eta_obs": eta_obs, "eta_ts": _iso(eta_ts), "verdict": verdict,
               "reasons": reasons}
    path_df = pd.DataFrame({"ts": test["ts"].to_numpy(), "n": path.n, "b": path.b,
                            "b_lo": b_lo, "b_hi": b_hi,
                            "cs_lo": np.where(np.isfinite(cs_lo), cs_lo, np.nan),
                            "cs_hi": np.where(np.isfinite(cs_hi), cs_hi, np.nan),
                            "halfwidth": np.where(np.isfinite(half), half, np.nan)})
    return ExperimentStatus(summary, series, het, health, path_df, plan, notes)
