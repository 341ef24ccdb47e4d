"""Memory: state bytes per series, and the resident size of a process holding 1M series.

Measured in a fresh interpreter (``python -m benchmarks.memory --child N``) so nothing else the
benchmark allocated counts. The child imports elmon, warms the compiled kernel, notes its
resident set size (RSS, from psutil, else /proc), then builds what a monitor of N series keeps:
the series names, a name -> index dict, and the pipeline's per-series state arrays; it feeds
every series 3 observations through :meth:`monitor.pipeline.run.Pipeline.run` in batches of 1M rows
(the batch outputs are freed after each batch, as the service does after committing), and notes
RSS again and the peak.

- state per series: the bytes of the state arrays divided by N (estimator state, plus the
  detectors' and rules' state where the pipeline has them);
- target (issue 8): at most 150 MB of state at 1M series;
- resident size: RSS after minus RSS before (state + names + index), and the process total.

One child process is run (its state sizes are exact; its RSS varies by a few MB between runs).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

from benchmarks.common import ROOT, Context, Row, median


BATCH = 1_000_000


def _rss() -> int:
    try:
        import psutil

        return psutil.Process().memory_info().rss
    except ImportError:
        with open("/proc/self/statm") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def _peak() -> int:
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def _state_arrays(states) -> list:
    """The arrays inside a pipeline state (an array, or a container of arrays)."""
    import numpy as np

    if isinstance(states, np.ndarray):
        return [states]
    if isinstance(states, dict):
        return [a for v in states.values() for a in _state_arrays(v)]
    if isinstance(states, (list, tuple)):
        return [a for v in states for a in _state_arrays(v)]
    if hasattr(states, "__dict__"):
        return _state_arrays(vars(states))
    return []


def child(n: int) -> dict:
    import numpy as np

    from monitor.pipeline.run import Pipeline
    from monitor.settings import Config, estimator_from_config

    cfg = Config()
    est = estimator_from_config(cfg)
    pipe = Pipeline.from_config(cfg, est)
    warm = pipe.new_states(2)
    X = np.column_stack([np.ones(4), np.log([5.0, 5.2, 4.9, 5.1])])
    pipe.run(np.array([0, 1, 0, 1]), X, np.array([3.0, 2.9, 3.1, 3.0]), n_series=2, states=warm)
    del warm
    rss0 = _rss()
    names = [f"store{i % 40:02d}/item{i:07d}" for i in range(n)]
    index = {s: i for i, s in enumerate(names)}
    states = pipe.new_states(n)
    rng = np.random.default_rng(3)
    rows = 3 * n
    for start in range(0, rows, BATCH):
        m = min(BATCH, rows - start)
        j = np.arange(start, start + m)
        sid = (j % n).astype(np.int64)      # arrival order: every series, then again
        lp = np.log(5.0) + rng.normal(0, 0.1, m)
        Xb = np.column_stack([np.ones(m), lp])
        yb = 3.0 - 1.8 * lp + rng.normal(0, 0.2, m)
        res = pipe.run(sid, Xb, yb, n_series=n, states=states)
        states = getattr(res, "states", states)
        del res, Xb, yb, sid, lp
    rss1 = _rss()
    state_bytes = sum(a.nbytes for a in _state_arrays(states))
    from monitor.estimators import kernel as K

    est_bytes = K.state_size(est.row_width) * 8 * n
    assert len(index) == n
    blocks = {name: stop - start for name, (start, stop) in pipe.layout().items() if stop > start}
    blocks["price_feedback"] = pipe.state_size - sum(blocks.values())
    return {"n": n, "rss0": rss0, "rss1": rss1, "peak": _peak(), "state_bytes": state_bytes,
            "estimator_state_bytes": est_bytes, "per_series": state_bytes / n, "blocks": blocks}


def run(ctx: Context) -> list[Row]:
    n = ctx.size(1_000_000, 100_000)
    results = []
    for _ in range(1):   # one fresh process: state sizes are exact, RSS varies little, and the
        #                  child costs about a minute of the 15-minute budget
        proc = subprocess.run([sys.executable, "-m", "benchmarks.memory", "--child", str(n)],
                              cwd=ROOT, capture_output=True, text=True, timeout=600)
        if proc.returncode != 0:
            raise RuntimeError(f"memory child failed: {proc.stderr.strip()[-500:]}")
        results.append(json.loads(proc.stdout.strip().splitlines()[-1]))
    r = results[-1]
    per = r["per_series"]
    state_mb = r["state_bytes"] / 1e6
    rows = [Row("state per series (estimator + detectors + rules, in the pipeline's arrays)",
                per, "bytes", [x["per_series"] for x in results],
                check=(f"k = 2 (intercept, log price): estimator "
                       f"{r['estimator_state_bytes'] / n:,.0f} bytes, detectors, episode "
                       f"trackers and rules {(r['state_bytes'] - r['estimator_state_bytes']) / n:,.0f}"
                       f" bytes (float64 throughout); floats per block of the pipeline's row: "
                       + ", ".join(f"{k.replace('_', ' ')} {v}"
                                   for k, v in r["blocks"].items()))),
            Row(f"state at {n:,} series", state_mb, "MB", [x["state_bytes"] / 1e6 for x in results],
                target="<= 150 MB", met=state_mb <= 150.0, better="lower",
                check="exact size of the state arrays (deterministic)")]
    grow = [(x["rss1"] - x["rss0"]) / 1e6 for x in results]
    rows.append(Row(f"resident size added by {n:,} series (state + names + name index)",
                    median(grow), "MB", grow, better="lower",
                    check=(f"process RSS {r['rss1'] / 1e6:,.0f} MB in all after 3 observations "
                           f"per series (imports {r['rss0'] / 1e6:,.0f} MB); peak "
                           f"{r['peak'] / 1e6:,.0f} MB while processing batches of {BATCH:,} "
                           f"rows")))
    for row in rows:
        row.target = row.target or "report"
    return rows


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--child":
        print(json.dumps(child(int(sys.argv[2]))))
    else:
        sys.exit("usage: python -m benchmarks.memory --child N")
