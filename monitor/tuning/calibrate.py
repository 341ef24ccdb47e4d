"""Tuning without known changes: design for a target in-control ARL, then check it on the data.

``elmon tune LOG --arl0 20000 --out DIR`` (no ``--truth``):

1. Design. Every chart threshold is designed for the target ``arl0`` (observations per series
   between false alarms): the level and slope charts by the pipeline's simulation of an iid
   normal in-control process (:mod:`monitor.detectors.design`); beside it the ARL calculator's
   normal-theory value for the same chart (:func:`monitor.detectors.arl.cusum_h_for_arl0`,
   :func:`monitor.detectors.arl.ewma_L_for_arl0`), which assumes independent N(0, 1) inputs.
2. Check (model-based moving-block bootstrap). The log is run once through the estimator; per
   series the standardized innovations ``z`` (after warm-up) are kept with their design rows.
   In-control paths are then built by concatenating circular blocks of consecutive
   observations of one series (rows and innovations together, so the data's autocorrelation,
   heavy tails and price pattern are kept), with ``y* = x' theta + sd * z*`` where ``theta``
   and ``sd`` are the series' final estimate and residual sd: no change inside a path. The real
   pipeline runs over each path with the chart thresholds set out of reach (so no chart
   resets) and each chart starting after ``5 (1 + lam) / (1 - lam)`` observations, as in the
   design; the first time a chart's statistic exceeds a threshold is that path's run length at
   that threshold, for every threshold at once (:func:`monitor.detectors.arl_mc.design_threshold_by_simulation`
   solves ``ARL(h) = arl0`` on the same paths).
3. Report. The data's false-alarm rate at the designed threshold, ``1 / ARL_data``, against the
   design's ``1 / arl0``; a difference of more than 20% is flagged, and the threshold that gives
   ``arl0`` on the data is written to ``recommended.toml``.

With the split likelihood-ratio detector (the default) steps 2 and 3 are those of
:mod:`monitor.tuning.alert_check`: its alerts per 10,000 observations of each kind on in-control
paths resampled from the log, against 10,000 / ``arl0``, with a verdict per kind (calibration.json
``alert_rates``); under the Poisson model its paths are counts drawn from the fitted model on
the log's own prices (:mod:`monitor.tuning.count_check`). Other detectors are checked for the
log-log model only; with another model they are named as not checked.

Block length per series: ``max(2 m, ceil(n^(1/3)))``, capped at n / 2, where m is the first lag
after which 5 sample autocorrelations in a row are inside ``+-2 / sqrt(n)`` (the first step of
the rule of Politis & White 2004, from memory). Paths are drawn from series in proportion to
their observations; the run lengths are censored at the path length (which biases ARL_data low,
towards flagging: reported in ``censored``).
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path

import numpy as np

from monitor.detectors.spec import CHARTS, chart_spec, threshold_key
from monitor.errors import ConfigError
from monitor.estimators import kernel as K
from monitor.settings import Config, default_config, estimator_from_config, validate
from monitor.tuning.blocks import block_length, bootstrap_indices


FLAG_RATIO = 0.20
#: threshold set out of reach per chart, so that no chart resets on a bootstrap path
_OUT_OF_REACH = {name: spec.out_of_reach for name, spec in CHARTS.items()}


def _series_material(rows, est, pipe, seed: int) -> list[dict]:
    """Per series: design rows, the data's innovations after warm-up, the reference
    innovations (the same rows with iid normal noise through the same estimator), the final
    theta and residual sd."""
    n_series = len(rows.names)
    res = pipe.run(rows.sid, rows.X, rows.y, n_series=n_series, ts=rows.ts)
    k = est.row_width
    theta = res.states[:, K.NS:K.NS + k].copy()
    bounds = np.searchsorted(rows.sid, np.arange(n_series + 1))
    last = np.maximum(bounds[1:] - 1, 0)
    sd = res.out[last, K.O_RESID_SD]
    rng = np.random.default_rng([seed, 7])
    th_rows, sd_rows = theta[rows.sid], sd[rows.sid]
    y0 = np.einsum("ij,ij->i", rows.X, th_rows) + np.nan_to_num(sd_rows) * rng.standard_normal(rows.n)
    ref = pipe.run(rows.sid, rows.X, y0, n_series=n_series, ts=rows.ts)

    def usable(r):
        return np.isfinite(r.out[:, K.O_Z]) & (r.out[:, K.O_STATUS] != K.ST_WARMING_UP)

    ok = usable(res) & usable(ref)
    out = []
    for s in range(n_series):
        a, b = bounds[s], bounds[s + 1]
        m = ok[a:b]
        if m.sum() < 30 or not np.isfinite(sd[s]):
            continue
        out.append({"series": rows.names[s], "X": rows.X[a:b][m], "z": res.out[a:b, K.O_Z][m],
                    "z_ref": ref.out[a:b, K.O_Z][m], "theta": theta[s], "sd": float(sd[s])})
    return out


def _paths_config(config: Config, charts: dict, warm: int) -> Config:
    data = {s: dict(v) if isinstance(v, dict) else v for s, v in config.data.items()}
    det = data.setdefault("detectors", {})
    for signal, (chart, _) in charts.items():
        key = threshold_key(signal, chart)
        det[key] = _OUT_OF_REACH[chart]
        det[f"{signal}_burn_in"] = warm
    return validate(data, "bootstrap config")


def chart_paths(material: list[dict], config: Config, charts: dict, n_paths: int, length: int,
                seed: int) -> dict[str, dict[str, np.ndarray]]:
    """Chart statistics on bootstrap in-control paths: ``{signal: {"data": (n_paths, length),
    "ref": (n_paths, length)}}``. Data and reference paths use the same series and blocks
    (common random numbers), so their comparison is not blurred by the draw."""
    from monitor.pipeline.kernel import S_LEVEL_STAT, S_SLOPE_STAT
    from monitor.pipeline.run import Pipeline

    est = estimator_from_config(config)
    warm = int(math.ceil(5 * (1 + est.forgetting) / (1 - est.forgetting))) if est.forgetting < 1 else 1000
    pipe = Pipeline.from_config(_paths_config(config, charts, warm), est)
    rng = np.random.default_rng(seed)
    weights = np.array([m["z"].size for m in material], dtype=float)
    pick = rng.choice(len(material), size=n_paths, p=weights / weights.sum())
    stats = {s: {w: np.empty((n_paths, length), dtype=np.float32) for w in ("data", "ref")}
             for s in charts}
    col = {"level": S_LEVEL_STAT, "slope": S_SLOPE_STAT}
    L = length + warm
    group = max(1, 1_000_000 // L)
    for g0 in range(0, n_paths, group):
        idx = range(g0, min(n_paths, g0 + group))
        Xs, yd, yr = [], [], []
        for p in idx:
            m = material[pick[p]]
            ii = bootstrap_indices(m["z"].size, L, m["block"], rng)
            X = m["X"][ii]
            fit = X @ m["theta"]
            Xs.append(X)
            yd.append(fit + m["sd"] * m["z"][ii])
            yr.append(fit + m["sd"] * m["z_ref"][ii])
        n = len(Xs)
        X = np.concatenate(Xs + Xs)
        sid = np.repeat(np.arange(2 * n), L)
        res = pipe.run(sid, X, np.concatenate(yd + yr), n_series=2 * n, keep_signals=True)
        for s in charts:
            v = res.signals[:, col[s]].reshape(2 * n, L)[:, warm:]
            v = np.where(np.isfinite(v), v, -np.inf)
            stats[s]["data"][g0:g0 + n] = v[:n]
            stats[s]["ref"][g0:g0 + n] = v[n:]
    return stats


def run_lengths(stat: np.ndarray, h_grid: np.ndarray) -> np.ndarray:
    """``(n_paths, len(h_grid))`` first times (1-based) each path's statistic exceeds each h;
    ``length + 1`` where it never did (censored)."""
    run_max = np.maximum.accumulate(stat, axis=1)
    return np.stack([np.searchsorted(r, h_grid, side="right") + 1 for r in run_max])


def censored_arl(tau: np.ndarray, length: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """ARL per column of ``tau`` by the censored-exponential maximum likelihood estimate
    (observed run length in total / number of paths that alarmed; common practice for
    right-censored waiting times), its approximate standard error (ARL / sqrt(alarms)), and
    the number of censored paths."""
    alarmed = (tau <= length).sum(axis=0)
    exposure = np.minimum(tau, length).sum(axis=0).astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        arl = np.where(alarmed > 0, exposure / np.maximum(alarmed, 1), np.inf)
        se = np.where(alarmed > 0, arl / np.sqrt(np.maximum(alarmed, 1)), np.inf)
    return arl, se, tau.shape[0] - alarmed


def solve_threshold(h_grid: np.ndarray, arl: np.ndarray, arl0: float) -> float | None:
    """h with ``ARL(h) = arl0`` by log-linear interpolation on the grid (None if not bracketed)."""
    above = np.flatnonzero(arl >= arl0)
    if not above.size or above[0] == 0:
        return None
    j = above[0]
    a0, a1 = math.log(arl[j - 1]), math.log(arl[j]) if np.isfinite(arl[j]) else math.log(arl0) + 1
    f = 1.0 if a1 == a0 else (math.log(arl0) - a0) / (a1 - a0)
    return float(h_grid[j - 1] + f * (h_grid[j] - h_grid[j - 1]))


def normal_theory(chart: str, kw: dict, arl0: float) -> float | None:
    """The ARL calculator's threshold for iid N(0, 1) inputs (None where the chart has none,
    as Page-Hinkley)."""
    theory = chart_spec(chart).normal_theory
    return None if theory is None else theory(kw, arl0)


def calibrate(log, out_dir, *, config: Config | None = None, arl0: float = 20000.0,
              chunk_rows: int | None = None, now_ns: int | None = None, n_paths: int = 200,
              n_steps: int | None = None, seed: int = 0, progress: bool = True) -> dict:
    """Design for ``arl0`` and check it by the block bootstrap (see the module docstring).

    Writes ``calibration.json`` (returned), ``recommended.toml`` and ``report.html``.
    """
    from monitor.pipeline.run import Pipeline
    from monitor.tuning.rows import load_rows
    from monitor.tuning.space import recommended_config, to_toml

    t0 = time.perf_counter()
    arl0 = float(arl0)
    if not 20 <= arl0 <= 1e6:
        raise ConfigError(f"--arl0 {arl0:g}: must be in [20, 1e6] observations")
    base = config or default_config()
    data = {s: dict(v) if isinstance(v, dict) else v for s, v in base.data.items()}
    data.setdefault("detectors", {})["arl0"] = arl0
    cfg = validate(data, "config with --arl0")
    est = estimator_from_config(cfg)
    pipe = Pipeline.from_config(cfg, est)
    rows = load_rows(log, cfg, chunk_rows, now_ns)
    charts, unchecked, split = {}, {}, False
    for signal, th in pipe.settings()["thresholds"].items():
        if th is None:
            continue
        if th["chart"] in _OUT_OF_REACH and getattr(est, "model", "") == "loglinear":
            kw = {k: v for k, v in th.items() if k in ("k", "lam")}
            charts[signal] = (th["chart"], th["threshold"], kw)
        elif th["chart"] == "split_glr" and getattr(est, "model", "") in ("loglinear",
                                                                          "poisson"):
            split = True
        else:      # said, never skipped silently
            unchecked[signal] = (f"{signal}: the {th['chart']} detector with the "
                                 f"{getattr(est, 'model', '?')} model is not checked by this "
                                 "bootstrap (it resamples log-log residuals; the count paths "
                                 "check the split_glr detector); check it with a truth file "
                                 "(elmon tune LOG --truth TRUTH)")
    alert_rates = None
    if split:
        from monitor.tuning.alert_check import check_alert_rates

        alert_rates = check_alert_rates(rows, cfg, arl0, n_obs=n_steps, seed=seed,
                                        progress=progress)
        if not alert_rates["checked"]:
            unchecked.update({s: f"{s}: split_glr not checked: {alert_rates['reason']}"
                              for s in ("level", "slope")})
    if not charts and (alert_rates is None or not alert_rates["checked"]) and not unchecked:
        raise ConfigError(f"{log}: nothing to check: no detector with a threshold is configured")
    material = []
    if charts:
        material = _series_material(rows, est, pipe, seed)
        if not material:
            raise ConfigError(f"{log}: no series has 30 observations past warm-up; the bootstrap "
                              "check needs the log's own innovations")
    for m in material:
        m["block"] = block_length(m["z"])
    n_steps = int(n_steps or 12_000_000)
    length = int(max(10, min(5 * arl0, n_steps // n_paths)))
    stats = chart_paths(material, cfg, {s: (c, h) for s, (c, h, _) in charts.items()}, n_paths,
                        length, seed) if charts else {}
    checks, thresholds = {}, {}
    for signal, (chart, h_design, kw) in charts.items():
        st = stats[signal]
        top = max(float(np.max(st["data"])), float(np.max(st["ref"])), 2 * h_design)
        h_grid = np.unique(np.r_[np.linspace(0.0, top, 400), h_design])
        arl, se, cens = censored_arl(run_lengths(st["data"], h_grid), length)
        arl_ref, se_ref, _ = censored_arl(run_lengths(st["ref"], h_grid), length)
        j = int(np.searchsorted(h_grid, h_design))
        # bootstrap ARLs relative to the reference's at the designed threshold (same bootstrap,
        # iid normal noise): the bootstrap's own distortion cancels; the reference stands for arl0
        ratio = float(arl_ref[j] / arl[j]) if arl[j] > 0 else math.inf   # data rate / design rate
        arl_d = arl0 / ratio if ratio > 0 else math.inf
        rel_se = math.sqrt((se[j] / arl[j]) ** 2 + (se_ref[j] / arl_ref[j]) ** 2) \
            if np.isfinite(arl[j]) and np.isfinite(arl_ref[j]) else math.inf
        h_data = solve_threshold(h_grid, arl, float(arl_ref[j]))
        flagged = bool(abs(ratio - 1.0) > FLAG_RATIO)
        name = threshold_key(signal, chart)
        checks[signal] = {
            "chart": chart, **kw, "design_threshold": h_design, "threshold_key": f"[detectors] {name}",
            "normal_theory_threshold": normal_theory(chart, kw, arl0) if signal == "level" else None,
            "design_arl0": arl0, "data_arl": _f(arl_d), "data_arl_se": _f(arl_d * rel_se),
            "bootstrap_arl_data": _f(arl[j]), "bootstrap_arl_reference": _f(arl_ref[j]),
            "design_rate_per_10k": 1e4 / arl0, "data_rate_per_10k": _f(1e4 / arl_d),
            "rate_ratio": _f(ratio), "rate_ratio_se": _f(ratio * rel_se), "flagged": flagged,
            "censored_paths": int(cens[j]), "data_threshold": h_data,
            "message": _message(signal, chart, ratio, arl0, arl_d, h_design, h_data, flagged),
            "curve": _curve(h_grid, np.where(len(st["data"]) - cens >= 10, arl * arl0 / arl_ref[j],
                                              np.nan))}
        if flagged and h_data is not None:
            thresholds[name] = round(h_data, 4)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    setting = {("detectors", "arl0"): arl0, **{("detectors", k): v for k, v in thresholds.items()}}
    split_msgs = [] if alert_rates is None or not alert_rates["checked"] else \
        [k["message"] for k in alert_rates["kinds"].values()]
    header = (f"elmon tune --arl0 {arl0:g}: thresholds for {arl0:g} observations per series between "
              "false alarms\n" + "\n".join([c["message"] for c in checks.values()] + split_msgs
                                             + list(unchecked.values())))
    (out / "recommended.toml").write_text(to_toml(recommended_config(base, setting), header))
    if material:
        used, paths, blocks = len(material), n_paths, [m["block"] for m in material]
    elif alert_rates is not None and alert_rates["checked"]:
        used, paths, length = (alert_rates["series_used"], alert_rates["paths"],
                               int(alert_rates["median_path_length"]))
        blocks = [0]      # no blocks: the split check resamples by an autoregressive sieve
    else:
        used, paths, length, blocks = 0, 0, 0, [0]
    summary = {"log": str(log), "arl0": arl0, "mode": "design check by block bootstrap",
               "series_used": used, "observations": rows.n, "paths": paths,
               "path_length": length, "block_lengths": {
                   "median": float(np.median(blocks)), "max": int(max(blocks))},
               "checks": checks, "unchecked": unchecked, "alert_rates": alert_rates,
               "flagged": any(c["flagged"] for c in checks.values())
               or bool(alert_rates and alert_rates.get("flagged")),
               "recommended_thresholds": thresholds, "seed": seed,
               "timing": {"wall_s": time.perf_counter() - t0}}
    (out / "calibration.json").write_text(json.dumps(summary, indent=2, sort_keys=True))
    from monitor.report.html import write_calibration_report

    write_calibration_report(out / "report.html", summary)
    return summary


def _curve(h_grid: np.ndarray, arl: np.ndarray, points: int = 80) -> dict:
    ok = np.flatnonzero(np.isfinite(arl) & (arl > 0))
    if not ok.size:
        return {"h": [], "arl": []}
    idx = ok[np.unique(np.linspace(0, ok.size - 1, points).round().astype(int))]
    return {"h": [float(v) for v in h_grid[idx]], "arl": [float(v) for v in arl[idx]]}


def _f(v):
    return float(v) if v is not None and math.isfinite(v) else None


def _message(signal, chart, ratio, arl0, arl_d, h, h_data, flagged) -> str:
    what = "level shift" if signal == "level" else "elasticity change"
    if not flagged:
        return (f"{what} {chart}: the data's false-alarm rate at the designed threshold "
                f"{h:.3f} is within 20% of the design ({ratio:.2f} times; ARL {arl_d:,.0f} "
                f"against {arl0:,.0f})")
    why = ("the standardized innovations are not independent N(0, 1): autocorrelation or heavy "
           "tails" if signal == "level" else "the data's slope statistic does not behave like the "
           "simulated in-control process: autocorrelated or heavy-tailed errors, or the price pattern")
    fix = (f"; a threshold of {h_data:.3f} gives {arl0:,.0f} on the data" if h_data is not None
           else "; no threshold in the searched range reaches the target on the data")
    more = "more" if ratio > 1 else "fewer"
    return (f"{what} {chart}: the data raise {more} false alarms than designed, {ratio:.2f} times "
            f"the rate at threshold {h:.3f} (ARL {arl_d:,.0f} instead of {arl0:,.0f}): {why}{fix}")
