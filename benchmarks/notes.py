"""The text under the table: what each group measures, the missed targets, the ratios.

The descriptions say what is timed; the causes of misses are what profiling showed when the
benchmark was written (cProfile of the path, and a bare RLS loop timed beside the kernel), so
they name where the time goes rather than guess.
"""

from __future__ import annotations

from benchmarks.common import Row, fmt, shares_text


MEASURES = {
    "estimator": (
        "**Estimator kernel.** `run_batch` (the compiled RLS step: coefficients, sandwich "
        "standard error, t interval, n_eff, status, standardized innovation, excitation guard) "
        "over rows in arrival order, one core (numba, no threads), forgetting 0.995; each run "
        "starts from fresh states, the output array is allocated once. References run on a "
        "prefix of the same rows, inputs converted to their native form before the clock "
        "starts: river's BayesianLinearRegression (`smoothing` = the forgetting factor, a "
        "constant feature), river's LinearRegression (SGD), statsmodels' RecursiveLS "
        "(`filter` only, lambda = 1), a plain Python RLS loop (`benchmarks/plain_rls.py`) and "
        "a bare compiled update of theta and P (`benchmarks/references.py`, the floor). The "
        "references compute less per observation than elmon (no interval, no status)."),
    "detection": (
        "**Estimator + detectors + rules.** `Pipeline.from_config(Config(), est).run(...)` over "
        "the same kind of rows (estimate, level and slope charts, bounds, sign flip, low "
        "variation, alert policy), against river's PageHinkley and ADWIN fed the standardized "
        "innovations elmon's own charts see. **Detection against the information bound** "
        "(rows starting `detection:` and the section of that name): the change grid of "
        "`simulators/change_grid.py` at ARL0 2,000 and 20,000 through the default pipeline, "
        "beside Lorden's (1971) bound, the slope chart as it was before issue 12 "
        "(`benchmarks/detection_old_slope.py`) and river's PageHinkley and ADWIN on the same "
        "rows; each row shows the worst cell of its check."),
    "replay": (
        "**Replay.** What `elmon replay LOG --out DIR` runs (`monitor.replay.driver.replay`, "
        "chunks of 1M rows) on a generated CSV of 1,000 series x 10,000 hourly rows: read, "
        "validate every row, run the pipeline, write estimates.csv (one row per observation), "
        "alerts.csv, rejects.csv and summary.json; beside pyarrow's `read_csv` of the same "
        "file from the page cache. A cProfile of a 1M-row replay in the same run says where "
        "the time goes."),
    "ingest": (
        "**Ingest.** Batches of 10,000 rows (ten hours of 1,000 series) written with "
        "`write_batch`, one transaction each, new store per run; beside plain sqlite3 "
        "`executemany` of the same rows as prebuilt tuples into the same table and index; "
        "and `ingest_file` (what `elmon ingest` runs) on the same rows as a CSV file."),
    "live": (
        "**Live path.** `Monitor.observe` one call at a time (validate, pipeline, and one "
        "committed store batch per call); `ElasticityRLS.learn_one` alone for the floor; and "
        "a running `Service` tailing a CSV at a 1 s poll: from a row being appended to its "
        "alert being in the outbox."),
    "memory": (
        "**Memory.** A fresh interpreter holding N series (names, a name index, the "
        "pipeline's state arrays) after 3 observations each; state bytes are the arrays' exact "
        "size, resident size is psutil's RSS."),
    "tuning": (
        "**Tuning.** `tune` over a 9-setting grid on a retail simulation with known change "
        "points, local worker processes and a Dask LocalCluster; settings x observations per "
        "second of wall time, and whether both engines score every setting the same."),
    "dashboard": (
        "**Dashboard.** AppTest of `dashboard/app.py` on a store of 10,000 series x 30 "
        "observations and estimates (computed by the real kernel), caches cleared before each "
        "first render."),
}

#: why the estimator kernel misses its targets (issue 15 profile)
KERNEL_CAUSE = (
    "measured for issue 15: not the loop's overhead (the same loop over the same rows with a "
    "trivial body, per-row array views included, runs at ~170M obs per CPU-second; the loop "
    "is compiled without reference counting) but the step itself, about 55-60 ns a row, the "
    "same for one series as for 10,000 (so neither memory nor the series' own recursion sets "
    "it). A copy of the step without its divisions, square roots and exp runs about 3x "
    "faster, but packing the independent divisions into 4-lane vector instructions (a quarter "
    "of the divider's work) gave only 5-15%, every bit unchanged: what costs is their latency "
    "along each row's chain (A01^2/A00 -> s_b -> b -> a -> V -> V/dof -> sqrt, 13-20 cycles "
    "each, and the call to exp for Duan's smearing sum), which the processor overlaps little "
    "from one row to the next (a row is ~400 instructions); the bare update of theta and P "
    "beside it computes none of the variance, interval, guard or status. Exactness rules "
    "out approximating them. Next to try: 4 series per vector instruction in the batch loop "
    "(rows of different series are independent and every lane does the same IEEE "
    "operation, so the bits stay), and the interval and status only for rows that are kept "
    "(thinned estimates)")


#: causes of misses seen when profiling, keyed by the start of the figure's name
CAUSES = {
    # measured 5 December 2026 (traces of the grid's cells, 200 series each, seed 12; the lead's
    # and a helper's runs; the known-time oracle is in every slope cell of the section below)
    "detection: median delay / information bound, step prices": (
        "under held prices the statistic moves in jumps at price steps: the known-time oracle "
        "beside it (true change time, no label to earn) is itself at 1.6x the bound for a "
        "change of 0.8. With the intercept held a level_shift opens first (a median 10 rows "
        "after the change, at the first price step); until 5 December 14:00 the slope chart "
        "then compared only the rows after the alarm, where one price step is explained as "
        "well by a second level shift there as by a change of b (3.15x); a strong level alarm "
        "now keeps the new regime's rows for the slope test (2.77x). Tried and not kept: a "
        "slope threshold 25% lower (the held-price in-control cells then at 0.84 of their "
        "budget) left it at 3.15x; no label margin gave 2.77x but doubled elasticity_change in "
        "control under held prices and raised it after level shifts to 2.3x the budget"),
    "detection: share of changes of b detected within 5x": (
        "the known-time oracle beside it finds 97-100% in every cell. Traced: at ARL0 2,000 "
        "with small changes most late series had an in-control elasticity_change shortly "
        "before the change, after which elmon starts again from the rows since (the oracle with "
        "only those rows: 86.5% for db 0.3 at price sd 0.1); under held prices the label margin "
        "(a change of b must beat every level-only change by the likelihood) holds the "
        "statistic at 0 while the price steps since the change cannot tell the two apart "
        "(the margin now grows with ln(ARL0), 1.01 at 2,000: held changes of 0.8 there 91% -> "
        "92%; without any margin 93%, at twice the held-price in-control rate); "
        "at ARL0 20,000 the statistic "
        "stops at 0.8-1.0 of its threshold (checkpoint spacing and the estimated scale)"),
    "detection: detected pure slope changes (pivots)": (
        "the ceiling beside it: an in-control level_shift at its budgeted rate opens before the "
        "elasticity_change in 17% of this cell's series (a median delay of 262 rows at ARL0 "
        "2,000), whatever the labels; the other pivot cells are at 92-100%"),
    "detection: in-control alerts": (
        "every cell outside the band is below it (fewer false alarms than budgeted): held "
        "prices, both kinds; errors whose variance grows with the price, the level chart and "
        "the slope chart at ARL0 2,000; AR(1) 0.3 errors, the level chart at 20,000. Traced "
        "(helper, 5 December, each rule switched off in a scratch copy, 300 series, ARL0 "
        "2,000): held prices: the label rules make both charts wait while the price has not "
        "moved (the slope alarm's margin grows with ln(ARL0), which took elasticity_change "
        "there from 0.46 to 0.73 of the budget at 2,000); errors whose variance grows with the "
        "price, level chart: the level-vs-pivot label rule, whose pivot alternative had a "
        "constant variance, so the far prices' large errors inflated it; since 5 December "
        "21:00 each alternative has the variance its after sample's prices imply (0.22 -> "
        "0.41 of the budget at 2,000, 0.28 -> 0.40 at 20,000), and what holds it now is the "
        "level statistic's own variance at far prices (linear, clipped); AR(1) "
        "errors, level chart: its autocorrelation is raised by one standard error (without "
        "that raise AR(1) 0.6 ran at 1.6x at 2,000). The slope chart under AR(1) errors (0.58-"
        "0.78 before 5 December 18:40) caps the slope score's autocorrelation by the prices' "
        "own times the errors' since then (for independent prices and errors the score's is "
        "the product): AR(1) 0.3 / 0.6 at 0.82-0.89 / 0.80-0.94, with the thresholds "
        "regenerated for it (independent prices 0.99-1.06)"),
    "detection: second change": (
        "traced on 1,000 series (seeds 12 and 13, ARL0 20,000, first alert open / fresh): a "
        "slope alarm drops every sum, so what the first change leaves is about 120 rows of "
        "history, with which the slope statistic saturates (its variance keeps the before "
        "sample's fixed term) and every loss costs more rows. Switched off one at a time in a "
        "scratch copy: the scale taking in the change's innovations before the freeze at half "
        "the threshold 42 -> 33 (fresh 29 -> 26), the true variance in its place 29-31, the true "
        "change time as the only candidate 36-37; all three 25, the known-time oracle on the "
        "same rows; the label margin, the hold, the aligned candidates and the start rule 1 row "
        "or less. Rules tried on that (a freeze at a quarter of the threshold, a freeze on the "
        "after sample's own statistic, holding the slope score's moments, a 150-row hold) raised "
        "in-control alerts under AR(1) errors or price-dependent noise to 1.2-1.5x the budget. "
        "Closing it needs a scale that does not learn a change of b while it builds up without "
        "a freeze keyed on a statistic, or candidates nearer the change; both change the "
        "in-control statistic and the threshold table. A scale per young candidate (as it "
        "was at its change time) gave 36 vs 28 with the old thresholds and 41 vs 29 with its "
        "own (slope thresholds +0.34 at 20,000), first changes slower: not kept"),
    "detection:": (
        "the cell named beside the figure is the worst of its check; the section 'Detection "
        "against the information bound' has every cell side by side with the old slope chart "
        "and river's detectors"),
    "estimator kernel, 2 parameters": KERNEL_CAUSE,
    "estimator batch loop": KERNEL_CAUSE,
    "live path: Monitor.observe": (
        "the calls take the one-row path and the median is well under 1 ms, but the tail is "
        "not: the CPU time per call (shown beside the wall time) has a p99 above 1 ms of its "
        "own, and on this shared machine (load average above the 2 cores) a call that is "
        "descheduled waits a few ms for a core, which the wall-clock p99 shows. Closing it: "
        "trim the CPU tail of the one-row path (the periodic work some calls do: a profile of "
        "the slowest 1% of calls is the place to start) and measure on a quiet machine"),
    "ingest into SQLite": (
        "part of it is SQLite itself on this shared machine: the plain sqlite3 row beside it "
        "(prebuilt tuples, the same unique index on two text columns, a WAL commit per batch) "
        "is the floor, and its ratio is write_batch's own overhead (turning the frame into "
        "tuples, formatting timestamps, checking values, per-series counts). Closing it: "
        "build the tuples from numpy columns in one pass and keep timestamps as text from "
        "the source"),
    "estimator + detectors + rules": (
        "the row shows four rates per CPU-second on the same rows: the estimator alone, the "
        "pipeline with the previous charts' family off (only its slope statistic runs) and "
        "every rule off, the same with the split GLR in its place, and the default pipeline. "
        "Measured on 5 December (1,000 series x 300 rows, shared machine): 3.7M, 1.5M and "
        "1.4M obs per CPU-second for the last three, against 20-28M for the estimator alone; "
        "the price-feedback diagnostic, which runs after the loop on every row, about 10M "
        "alone (the row below). So more than half of a row's cost is the split GLR (each row "
        "updates 11 checkpoints' sums and evaluates the slope and level statistics at each, "
        "with divisions and the after sample's own variance for the young ones), the rest the "
        "step outside it (status, the run and episode trackers, the state row of 376 floats "
        "it reads and writes, the event and signal bookkeeping) and the feedback diagnostic; "
        "the rules add little. 15M obs/s (67 ns a row; the estimator's own step is 35-50) "
        "leaves no room for a change detector that tests every log-spaced past time: the "
        "target conflicts with issue 12's detector. Closing part of it: evaluate the "
        "statistics only when a cheap bound says a checkpoint can reach the threshold"),
    "replay of a 3M-row CSV": (
        "the pipeline loop alone (estimator, split GLR, rules, price-feedback check) costs "
        "about 0.7-0.9 us a row, 2-3 CPU-s of the 3M rows, already 5-8x pyarrow's "
        "multi-threaded parse (0.36-0.45 CPU-s in the runs of 5 December); validation, the reader thread, the estimates "
        "table and Parquet writing take the rest (measured on 5 December: validation 2.05 -> "
        "0.72 CPU-s with compiled fast paths for plain ISO timestamps, clean text columns and "
        "the ordered checks' sorted windows). The 3x and 2x targets need the pipeline row to "
        "cost what the parse does, which the split GLR's per-row candidates rule out (see the "
        "pipeline figure)"),
    "replay of a 10M-row CSV": (
        "the replay group times the whole command by wall clock against pyarrow's parse by "
        "wall clock; the replay_output group's CPU-time figures above say where it goes"),
    "state at": (
        "the row's blocks are listed beside the state per series above. The largest is the "
        "split likelihood-ratio detector of issue 12 (190 floats without controls: 11 "
        "log-spaced checkpoints of 6 sums each, the reference, level-free and window sums, "
        "its own fit of the controls' normal equations, 46, the sums of x^3 and x^4 for "
        "the after sample's variance, 17, and four CUSUM-placed level candidates, 28); its "
        "checkpoints alone are 528 bytes in float64 "
        "and still 264 in float32. 150 MB at 1M series allows about 19 float64 per series, "
        "which a detector that tests a change at every log-spaced past time cannot fit: the "
        "target conflicts with issue 12's detector. What would shrink the rest: float32 for "
        "the trackers and rules, episode trackers kept only while an episode is open, the "
        "control fit only in pipelines with controls, P and S as upper triangles"),
}


#: what would shrink each part of a profile (see Row.profile)
REMEDIES = {
    "writing outputs": "write estimates.csv thinned (sample_every) or as Parquet: the CSV "
                       "writer formats a text row of 12 fields per observation",
    "validation": "profile validate_frame's own checks next (its share is above) and "
                  "compile or merge the costliest passes",
    "reading": "read only the needed columns, with their types given to pyarrow",
    "reading the CSV": "parse each byte block with pyarrow in one call where the lines are "
                       "well formed",
    "estimates table": "build the output columns straight from numpy arrays",
    "pipeline kernel": "see the pipeline figure",
    "store writes (write_batch)": "keep estimates thinned ([store] estimates_every) and build "
                                  "the insert tuples from numpy columns in one pass",
    "SQLite statements (executemany, execute, commit)": (
        "this is SQLite's own work for these rows (the plain-sqlite3 replay of the very same "
        "statements beside the whole service batch row is its floor): every kept estimate is a "
        "13-column row under a (series, ts) key besides the observation; keep estimates "
        "thinned ([store] estimates_every) where the history need not hold every update"),
    "write_batch's own Python (checks, tuples)": (
        "sqlite3's executemany takes one Python tuple per row, so what is left is building "
        "them (one list per column, zipped) and the sparkline text of each kept estimate"),
    "checkpoints": "write checkpoints as one vectorized batch (or every n batches) instead of "
                   "one JSON document per touched series per batch",
    "duplicate check against the store": "check against the in-memory last timestamps first "
                                         "and query the store only for older rows",
}


def _from_profile(shares: dict[str, float]) -> str:
    top = [k for k, _ in sorted(shares.items(), key=lambda kv: -kv[1]) if k != "other"][:2]
    fixes = "; ".join(f"{k}: {REMEDIES[k]}" for k in top if k in REMEDIES)
    text = f"where the time goes (cProfile, measured in this run): {shares_text(shares)}"
    return text + (f". Closing it: {fixes}" if fixes else "")


def _misses(rows: list[Row]) -> list[str]:
    out = []
    for r in rows:
        if r.met is False:
            cause = _from_profile(r.profile) if r.profile else \
                next((c for k, c in CAUSES.items() if r.figure.startswith(k)), None)
            line = f"- **{r.figure}**: {fmt(r.value, r.unit)} against {r.target}."
            if cause:
                line += f" Why: {cause}."
            out.append(line)
    return out


def missed_lines(rows: list[Row]) -> list[str]:
    """The 'Missed targets' lines of ``rows`` (one per missed target, with its cause)."""
    return _misses(rows)


def _short(name: str) -> str:
    """A reference's name without the 'on the first ...' part."""
    for cut in (" on the first", " on its first", " on z of", " on the same", " of the same"):
        if cut in name:
            name = name[:name.index(cut)]
    return name


def readme_section(rows: list[Row]) -> str:
    """One line per figure that has references: its value and how elmon compares."""
    lines, main, refs = [], None, []

    def flush():
        if main is not None and refs and main.value is not None:
            lines.append(f"- {main.figure}: {fmt(main.value, main.unit)}; " + "; ".join(refs))

    for r in rows:
        if not r.reference:
            flush()
            main, refs = r, []
        elif r.ratio and r.value is not None:
            refs.append(f"{_short(r.figure)} {fmt(r.value, r.unit)} ({r.ratio})")
    flush()
    return "\n".join(lines)


def text(rows: list[Row]) -> str:
    groups = []
    for r in rows:
        if r.group and r.group not in groups:
            groups.append(r.group)
    parts = ["## What each figure measures", ""]
    parts += [MEASURES[g] + "\n" for g in groups if g in MEASURES]
    missed = _misses(rows)
    parts += ["## Missed targets", ""]
    parts += missed or ["None in this run."]
    unmeasured = [r for r in rows if r.value is None and r.check.startswith("not measured")]
    if unmeasured:
        parts += ["", "## Not measured", ""]
        parts += [f"- {r.figure}: {r.check[len('not measured: '):]}" for r in unmeasured]
    parts += ["", "## Ratios against the references (same run, same rows)", "",
              readme_section(rows) or "(no reference rows in this run)"]
    return "\n".join(parts)
