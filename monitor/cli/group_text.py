"""``elmon status --group-by NAME``: one line per group (not a command module itself; the
status command calls :func:`render_groups`)."""

from __future__ import annotations

import math

from monitor.store import groups as sgroups


def _f(v, spec=".2f") -> str:
    return "-" if v is None or (isinstance(v, float) and not math.isfinite(v)) else format(v, spec)


def render_groups(store, group_by: list[str], fdr: float = 0.05, limit: int = 50) -> str:
    """Groups of ``group_by`` (stored attributes): series, series with an estimate, the group's
    mean b and 95% band, the spread tau, and how many series differ (Benjamini-Hochberg at
    ``fdr``), sorted by mean b."""
    per_series, per_group = sgroups.pool_latest(store, group_by, fdr=fdr)
    per_group = per_group.sort_values(["mean", "group"], na_position="last", kind="stable")
    head = (f"groups by {', '.join(group_by)} ({len(per_group)}; pooled latest estimates, "
            f"95% band of the group mean, differ = series away from their group at FDR {fdr:g}):")
    width = max([5] + [len(str(g)) for g in per_group["group"]])
    lines = [head, f"  {'group':<{width}} {'series':>6} {'with b':>6} {'mean b':>7} "
                   f"{'95% band':>17} {'tau':>5} {'differ':>6}"]
    for r in per_group.head(limit).itertuples(index=False):
        band = ("-" if not math.isfinite(r.mean_lo) else f"[{r.mean_lo:.2f}, {r.mean_hi:.2f}]")
        lines.append(f"  {str(r.group):<{width}} {r.n_series:>6} {r.n_pooled:>6} "
                     f"{_f(r.mean):>7} {band:>17} {_f(r.tau):>5} {r.n_differ:>6}")
    if len(per_group) > limit:
        lines.append(f"  ... and {len(per_group) - limit} more groups")
    loose = int(per_series["group"].isna().sum())
    if loose:
        lines.append(f"  {loose} series have no value for {', '.join(group_by)} (no group)")
    lines.append("  Estimates are statistical evidence, not decisions; a group needs 3 series "
                 "with an estimate for a mean.")
    return "\n".join(lines)
