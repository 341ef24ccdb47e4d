"""``detection`` group of ``make bench``: how fast the pipeline runs and how well it detects.

Two parts, one group:

- speed (:mod:`benchmarks.detection_speed`): the compiled pipeline over 10,000 series x 1,000
  steps against river's PageHinkley and ADWIN on the same innovations;
- detection against the information bound (issue 12; :mod:`benchmarks.detection_grid`, tables
  in :mod:`benchmarks.detection_report`): the change grid of :mod:`simulators.change_grid` at
  ARL0 2,000 and 20,000, elmon beside the bound, the slope chart as it was before issue 12 and
  river's detectors, all on the same rows in one run. Its tables become a section of
  RESULTS.md (``ctx.sections``); one row per done-when check goes into the main table.
"""

from __future__ import annotations

from benchmarks.common import Context, Row, attempt


def run(ctx: Context) -> list[Row]:
    from benchmarks import detection_speed
    from benchmarks.detection_grid import measure
    from benchmarks.detection_report import section, target_rows

    rows = attempt("estimator + detectors + rules (Pipeline.run)", lambda: detection_speed.run(ctx))
    sizes = (dict(n_slope=40, n_control=100, n_level=100, n_river=8, n_second=40, quick=True)
             if ctx.quick else {})
    grid = measure(log=ctx.log, **sizes)
    ctx.sections = [*getattr(ctx, "sections", []), section(grid)]
    return rows + target_rows(grid)
