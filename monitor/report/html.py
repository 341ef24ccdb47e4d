"""Self-contained HTML reports of a replay and of a tuning run (inline SVG, no script, no network).

The replay report holds: the run's counts and timing; with a truth file, the detection summary
and one row per known change (detected or missed, delay in observations and time); an alert
timeline (one line per series, a marker per opened alert, shape by rule, known changes as grey
ticks); and, per chosen series, the elasticity path with its confidence band, the true b (when
the simulators' ``TRUTH_path.csv`` sits beside the truth file), the known change points and
the alerts. Every chart is an ``<svg>`` element built by :mod:`monitor.report.svg`; the file
opens in any browser offline and can be mailed or archived as one file.
"""

from __future__ import annotations

import datetime as _dt
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.report.svg import COLOURS, RULE_MARKERS, Chart, esc, thin


CAUTION = ("These estimates are statistical evidence to inform decisions, not decisions. "
           "Elasticities estimated from observational prices can be biased; randomized price "
           "tests are the sound basis. Local regulation on pricing and utility tariffs comes first.")
STYLE = """body{font-family:sans-serif;margin:24px;color:#222;max-width:1100px}
h1{font-size:22px}h2{font-size:17px;margin-top:28px;border-bottom:1px solid #ccc}
table{border-collapse:collapse;font-size:12px;margin:8px 0}
td,th{border:1px solid #ccc;padding:3px 7px;text-align:left}th{background:#f2f2f2}
td.n{text-align:right;font-variant-numeric:tabular-nums}.note{color:#555;font-size:12px}
.caution{background:#fff8e6;border:1px solid #e0c080;padding:8px;font-size:12px}"""
MAX_TABLE_ROWS = 300
MAX_TIMELINE_SERIES = 40


def page(title: str, sections: list[str]) -> str:
    """A complete HTML document around the given section fragments."""
    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    return (f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{esc(title)}</title><style>{STYLE}</style></head><body>\n"
            f"<h1>{esc(title)}</h1><p class=\"note\">written {now} by elmon</p>\n"
            f"<p class=\"caution\">{esc(CAUTION)}</p>\n" + "\n".join(sections) + "\n</body></html>\n")


def table_html(df: pd.DataFrame, max_rows: int = MAX_TABLE_ROWS, floats: str = "{:.3g}") -> str:
    """An HTML table; numbers right-aligned, NaN shown as an empty cell, long tables cut."""
    head = "".join(f"<th>{esc(c)}</th>" for c in df.columns)
    body = []
    for rec in df.head(max_rows).itertuples(index=False):
        cells = []
        for v in rec:
            if isinstance(v, (float, np.floating)):
                text = "" if not np.isfinite(v) else (f"{int(v):,}" if v == int(v) and abs(v) < 1e12
                                                      else floats.format(v))
                cells.append(f'<td class="n">{esc(text)}</td>')
            elif isinstance(v, (int, np.integer)) and not isinstance(v, bool):
                cells.append(f'<td class="n">{int(v):,}</td>')
            else:
                cells.append(f"<td>{esc('' if v is None else v)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    more = (f'<p class="note">showing {max_rows} of {len(df)} rows; the full table is in the CSV '
            "file beside this report</p>") if len(df) > max_rows else ""
    return f"<table><tr>{head}</tr>{''.join(body)}</table>{more}"


def kv_table(items: list[tuple[str, object]]) -> str:
    rows = "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in items)
    return f"<table>{rows}</table>"


def _fmt(v, spec="{:,.3g}") -> str:
    if v is None:
        return "—"
    if isinstance(v, float):
        return spec.format(v) if np.isfinite(v) else "—"
    return f"{v:,}" if isinstance(v, int) else str(v)


def _summary_section(s: dict) -> str:
    t = s.get("timing", {})
    items = [("log", s.get("log")), ("rows read", _fmt(s.get("rows"))),
             ("processed", _fmt(s.get("accepted"))), ("rejected (see rejects.csv)", _fmt(s.get("rejected"))),
             ("zero quantities skipped", _fmt(s.get("zero_skipped"))), ("series", _fmt(s.get("series"))),
             ("alerts", _fmt(s.get("alerts")))]
    items += [(f"  alerts: {k}", _fmt(v)) for k, v in sorted(s.get("alerts_by_rule", {}).items())]
    items += [("wall time, s", _fmt(t.get("wall_s"), "{:.2f}")),
              ("rows per second", _fmt(t.get("rows_per_s"), "{:,.0f}"))]
    return "<h2>Run</h2>" + kv_table(items)


def _detection_section(det: dict, changes: pd.DataFrame) -> str:
    items = [("response changes with data after them", _fmt(det["changes"])),
             ("detected", _fmt(det["detected"])), ("missed", _fmt(det["missed"])),
             ("detection rate", _fmt(det["detection_rate"], "{:.0%}")),
             ("median delay, observations", _fmt(det["median_delay_obs"], "{:.1f}")),
             ("90th percentile delay, observations", _fmt(det["p90_delay_obs"], "{:.1f}")),
             ("median delay, hours", _fmt(None if det["median_delay_s"] is None else det["median_delay_s"] / 3600, "{:.1f}")),
             ("quiet observations (no known change)", _fmt(det["quiet_obs"])),
             ("false alarms there", _fmt(det["false_alarms"])),
             ("false alarms per 10,000 observations", _fmt(det["false_alarms_per_10k"], "{:.2f}")),
             ("detection window after a change, observations", _fmt(det["horizon_obs"]))]
    cols = ["series", "kind", "ts", "status", "alert_rule", "alert_ts", "delay_obs", "delay_s",
            "window_obs", "beta_before", "beta_after"]
    return ("<h2>Detection against the known changes</h2>" + kv_table(items)
            + '<p class="note">Delay: observations of the series from the first affected one to the '
              "alert (0 = on it). False alarms: change alerts outside every change's window.</p>"
            + table_html(changes[cols]))


def _timeline(alerts_ns: pd.DataFrame, truth: pd.DataFrame | None, order: list[str]) -> str:
    series = order[:MAX_TIMELINE_SERIES]
    if not series:
        return ""
    pos = {s: i for i, s in enumerate(series)}
    ts_all = list(alerts_ns["ts"].to_numpy(dtype=np.int64))
    if truth is not None:
        ts_all += list(truth.loc[truth["series"].isin(series), "ts"].to_numpy(dtype=np.int64))
    if not ts_all:
        return ""
    c = Chart((min(ts_all), max(ts_all)), (-0.7, len(series) - 0.3), x_time=True,
              height=60 + 18 * len(series), title="Alert timeline", y_categories=series)
    if truth is not None:
        t = truth[truth["series"].isin(series)]
        c.markers(t["ts"], [pos[s] for s in t["series"]], "circle", "#9a9a9a", 4,
                  [f"known {k} at {s}" for k, s in zip(t["kind"], t["series"])], filled=False)
    legend = []
    for rule, g in alerts_ns[alerts_ns["series"].isin(series)].groupby("rule"):
        shape, colour = RULE_MARKERS.get(rule, ("circle", COLOURS["alert"]))
        c.markers(g["ts"], [pos[s] for s in g["series"]], shape, colour, 4.5,
                  [f"{rule}: {s}" for s in g["series"]])
        legend.append((shape, colour, rule))
    legend.append(("circle", "#9a9a9a", "known change"))
    c.legend(legend)
    more = (f'<p class="note">first {MAX_TIMELINE_SERIES} of {len(order)} series with alerts or '
            "known changes</p>") if len(order) > MAX_TIMELINE_SERIES else ""
    return "<h2>Alerts over time</h2>" + c.to_svg() + more


def _path_chart(name: str, est: pd.DataFrame, true_path: pd.DataFrame | None,
                truth: pd.DataFrame | None, alerts_ns: pd.DataFrame) -> str:
    est = est.sort_values("ts_ns", kind="stable")
    keep = thin(len(est))
    e = est.iloc[keep]
    x = e["ts_ns"].to_numpy(dtype=np.int64)
    lo, hi, b = (e[c].to_numpy(dtype=float) for c in ("beta_lo", "beta_hi", "beta"))
    vals = np.r_[b[np.isfinite(b)], lo[np.isfinite(lo)], hi[np.isfinite(hi)]]
    tp = None
    if true_path is not None:
        tp = true_path[true_path["series"] == name]
        vals = np.r_[vals, tp["beta"].to_numpy(dtype=float)]
    if vals.size == 0 or x.size == 0:
        return f"<h3>{esc(name)}</h3><p class=\"note\">no estimate beyond warm-up</p>"
    ylo, yhi = np.nanpercentile(vals, [1, 99]) if vals.size > 50 else (vals.min(), vals.max())
    pad = 0.1 * (yhi - ylo) + 0.05
    c = Chart((x.min(), x.max()), (ylo - pad, yhi + pad), x_time=True, height=250,
              title=f"Elasticity of {name}", ylabel="b")
    c.band(x, np.clip(lo, ylo - pad, yhi + pad), np.clip(hi, ylo - pad, yhi + pad))
    c.line(x, b, label="estimated b")
    legend = [("area", COLOURS["band"], "confidence band"), ("line", COLOURS["estimate"], "estimated b")]
    if tp is not None and len(tp):
        k = thin(len(tp))
        c.line(tp["ts_ns"].to_numpy()[k], tp["beta"].to_numpy(dtype=float)[k], COLOURS["truth"], 1.4,
               "5 3", "true b")
        legend.append(("dash", COLOURS["truth"], "true b"))
    if truth is not None:
        for _, r in truth[truth["series"] == name].iterrows():
            c.vline(r["ts"], "#9a9a9a", "2 3", f"known {r['kind']}")
    a = alerts_ns[alerts_ns["series"] == name]
    if len(a):
        at = a["ts"].to_numpy(dtype=np.int64)
        ab = np.interp(at, est["ts_ns"].to_numpy(dtype=float), est["beta"].ffill().bfill().to_numpy(dtype=float))
        for rule, g in a.assign(b=ab).groupby("rule"):
            shape, colour = RULE_MARKERS.get(rule, ("circle", COLOURS["alert"]))
            c.markers(g["ts"], g["b"], shape, colour, 5, [f"{rule}" for _ in range(len(g))])
            legend.append((shape, colour, rule))
    c.legend(legend)
    return c.to_svg()


def _read_true_path(truth_file, names: list[str]) -> pd.DataFrame | None:
    """Rows of the chosen series from ``TRUTH_path.csv`` beside ``TRUTH.csv`` (the simulators'
    true b per observation), or None when there is no such file."""
    if truth_file is None or not names:
        return None
    t = Path(truth_file)
    p = t.with_name(f"{t.stem}_path{t.suffix}")
    if not p.is_file():
        return None
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.csv as pacsv

    from monitor.rows.validate import parse_timestamps

    try:
        tbl = pacsv.read_csv(p, convert_options=pacsv.ConvertOptions(
            include_columns=["series", "ts", "beta"],
            column_types={"series": pa.string(), "ts": pa.string(), "beta": pa.float64()}))
    except (pa.ArrowInvalid, KeyError):
        return None        # not a path file of the simulators' format: plot without it
    df = tbl.filter(pc.is_in(tbl["series"], value_set=pa.array(names))).to_pandas()
    df["ts_ns"] = parse_timestamps(df["ts"])
    return df


def write_replay_report(path, summary: dict, frames: pd.DataFrame | None, alerts: pd.DataFrame,
                        opened: pd.DataFrame, truth: pd.DataFrame | None, scores, truth_file=None) -> Path:
    """Write the replay report (see the module docstring) to ``path``; returns the path."""
    sections = [_summary_section(summary)]
    if scores is not None:
        sections.append(_detection_section(summary["detection"], scores.changes))
    alert_counts = opened["series"].value_counts()
    order = list(dict.fromkeys(
        (list(truth["series"]) if truth is not None else []) + list(alert_counts.index)))
    sections.append(_timeline(opened, truth, order))
    if frames is not None and len(frames):
        names = list(dict.fromkeys(frames["series"]))
        true_path = _read_true_path(truth_file, names)
        sections.append("<h2>Elasticity paths</h2><p class=\"note\">b: the elasticity, d log q / d log p. "
                        "Band: the confidence interval of each estimate.</p>")
        for name, g in frames.groupby("series", sort=False):
            sections.append(_path_chart(str(name), g, true_path, truth, opened))
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(page(f"elmon replay of {Path(summary.get('log', '')).name}", sections), encoding="utf-8")
    return path


def _tradeoff_chart(summary: dict, res: pd.DataFrame) -> str:
    """False alarms per 10,000 against median delay (misses as infinite), front and budget."""
    fa = res["false_alarms_per_10k"].astype(float).to_numpy()
    d = res["median_delay_all_obs"].astype(float).to_numpy()
    budget = float(summary["max_false_alarms_per_10k"])
    finite = np.isfinite(d)
    top = (np.nanmax(d[finite]) if finite.any() else 10.0) * 1.15 + 1.0
    y = np.where(finite, d, top)
    fa_plot = np.nan_to_num(fa, nan=0.0)
    xmax = max(float(np.nanmax(fa_plot)) if fa_plot.size else 1.0, budget) * 1.1 + 1e-9
    c = Chart((0.0, xmax), (0.0, top * 1.05), height=340, title="False alarms against detection delay",
              xlabel="false alarms per 10,000 quiet observations",
              ylabel="median delay, observations (misses = never)")
    c.vline(budget, COLOURS["alert"], "6 3", f"budget {budget:g}")
    if (~finite).any():
        c.hline(top, "#9a9a9a", "2 3", "above this line: half or more of the changes missed")
    labels = [f"{lab}: {f:.3g} false alarms / 10k, median delay {'never' if not np.isfinite(v) else f'{v:.3g}'}"
              for lab, f, v in zip(res["label"], fa, d)]
    other = ~res["pareto"].to_numpy(dtype=bool)
    c.markers(fa_plot[other], y[other], "circle", COLOURS["other"], 3.5, np.array(labels)[other], filled=False)
    front = np.flatnonzero(res["pareto"].to_numpy(dtype=bool))
    front = front[np.argsort(fa_plot[front], kind="stable")]
    c.line(fa_plot[front], y[front], COLOURS["front"], 1.4, label="Pareto front")
    c.markers(fa_plot[front], y[front], "diamond", COLOURS["front"], 4.5, np.array(labels)[front])
    c.markers(fa_plot[:1], y[:1], "square", COLOURS["truth"], 5, [labels[0]], filled=False)
    rec = np.flatnonzero(res["recommended"].to_numpy(dtype=bool))
    if rec.size:
        c.markers(fa_plot[rec], y[rec], "triangle", COLOURS["alert"], 7, [labels[rec[0]]])
    c.legend([("circle", COLOURS["other"], "setting"), ("diamond", COLOURS["front"], "Pareto front"),
              ("square", COLOURS["truth"], "defaults"), ("triangle", COLOURS["alert"], "recommended"),
              ("dash", COLOURS["alert"], "budget")])
    return c.to_svg()


def _metric_items(prefix: str, m: dict) -> list[tuple[str, str]]:
    return [(f"{prefix} false alarms per 10,000", _fmt(m["false_alarms_per_10k"], "{:.2f}")),
            (f"{prefix} detection rate", _fmt(m["detection_rate"], "{:.0%}")),
            (f"{prefix} median delay counting misses as never, obs",
             _fmt(m["median_delay_all_obs"], "{:.1f}")),
            (f"{prefix} median / 90th percentile delay of the detected, obs",
             f"{_fmt(m['median_delay_obs'], '{:.1f}')} / {_fmt(m['p90_delay_obs'], '{:.1f}')}")]


def write_tuning_report(path, summary: dict, res: pd.DataFrame) -> Path:
    """The tuning report: trade-off plot, the recommendation and every setting's metrics."""
    rec = summary.get("recommended")
    items = [("log", summary["log"]), ("truth", summary["truth"]), ("search space", summary["space"]),
             ("settings evaluated", _fmt(summary["settings"])),
             ("observations per setting", _fmt(summary["observations"])),
             ("false-alarm budget per 10,000 observations", _fmt(summary["max_false_alarms_per_10k"])),
             ("recommendation", rec["label"] if rec else "none within the budget"),
             ("why", summary["reason"])]
    if rec:
        items += _metric_items("  its", rec)
    items += _metric_items("defaults:", summary["defaults"])
    order = res.assign(_d=res["median_delay_all_obs"].fillna(np.inf)).sort_values(
        ["recommended", "within_budget", "_d"], ascending=[False, False, True], kind="stable")
    cols = [c for c in res.columns if c not in ("_d", "median_delay_s")]
    note = ('<p class="note">recommended.toml beside this report is the base config with the '
            "recommended values: pass it to elmon replay or elmon run with --config. The rates "
            "are measured on this log; check them on held-out data before relying on them.</p>"
            if rec else
            '<p class="note">No setting met the false-alarm budget, so nothing is recommended and '
            "no recommended.toml was written: widen the search space, allow more false alarms "
            "(--max-false-alarms) or check the truth file.</p>")
    sections = ["<h2>Recommendation</h2>" + kv_table(items) + note,
                "<h2>Trade-off</h2>" + _tradeoff_chart(summary, res),
                "<h2>Every setting</h2>" + table_html(order[cols], floats="{:.4g}")]
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(page(f"elmon tune of {Path(summary['log']).name}", sections), encoding="utf-8")
    return path


def write_calibration_report(path, summary: dict) -> Path:
    """The no-truth tuning report: per chart, ARL against threshold on the data's bootstrap
    paths, the design point and the target; the flags in words."""
    arl0 = summary["arl0"]
    sections = ["<h2>Design check</h2>" + kv_table([
        ("log", summary["log"]), ("target in-control ARL, observations per series", _fmt(arl0)),
        ("series used", _fmt(summary["series_used"])), ("bootstrap paths", _fmt(summary["paths"])),
        ("path length, observations", _fmt(summary["path_length"])),
        ("median block length", _fmt(summary["block_lengths"]["median"])),
        ("flagged (data differ from the design by more than 20%)",
         "yes" if summary["flagged"] else "no")])]
    rows = []
    for signal, c in summary["checks"].items():
        rows.append({"signal": signal, "chart": c["chart"], "threshold key": c["threshold_key"],
                     "designed": c["design_threshold"], "normal theory": c["normal_theory_threshold"],
                     "data ARL at designed": c["data_arl"], "rate ratio data/design": c["rate_ratio"],
                     "flagged": "yes" if c["flagged"] else "no",
                     "threshold for the target on the data": c["data_threshold"]})
        sections.append(f"<p>{esc(c['message'])}</p>")
    if rows:
        sections.insert(1, table_html(pd.DataFrame(rows).astype(object).where(
            pd.DataFrame(rows).notna(), None)))
    rates = summary.get("alert_rates") or {}
    if rates.get("checked"):      # the split detector's check (monitor.tuning.alert_check)
        sections.append("<h2>False alerts on resampled in-control logs</h2>" + table_html(
            pd.DataFrame([{"kind": kind, "alerts": k["alerts"], "per 10,000": k["rate_per_10k"],
                           "designed per 10,000": k["design_per_10k"], "ratio": k["ratio"],
                           "95% low": k["ratio_lo"], "95% high": k["ratio_hi"],
                           "iid normal errors, ratio": k["reference"]["ratio"],
                           "verdict": k["verdict"]} for kind, k in rates["kinds"].items()])))
        sections.extend(f"<p>{esc(k['message'])}</p>" for k in rates["kinds"].values())
    for signal, c in summary["checks"].items():
        h, a = np.asarray(c["curve"]["h"]), np.asarray(c["curve"]["arl"])
        if not h.size:
            continue
        la = np.log10(a)
        ch = Chart((h.min(), h.max()), (min(la.min(), np.log10(arl0)) - 0.2, max(la.max(), np.log10(arl0)) + 0.2),
                   height=280, title=f"{signal} chart ({c['chart']}): in-control ARL on the data",
                   xlabel="threshold", ylabel="log10 ARL, observations")
        ch.hline(np.log10(arl0), COLOURS["truth"], "5 3", f"target {arl0:g}")
        ch.vline(c["design_threshold"], COLOURS["alert"], "6 3", "designed threshold")
        ch.line(h, la, COLOURS["estimate"], 1.8, label="bootstrap of the data")
        ch.legend([("line", COLOURS["estimate"], "data (block bootstrap)"),
                   ("dash", COLOURS["truth"], "target ARL0"), ("dash", COLOURS["alert"], "designed threshold")])
        sections.append(ch.to_svg())
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(page(f"elmon tune (no truth) of {Path(summary['log']).name}", sections), encoding="utf-8")
    return path
