"""``elmon ingest``'s start without scipy.stats and sqlite-utils (issue 15).

``t_table`` is computed with ``scipy.special.stdtrit`` / ``ndtri`` (what ``scipy.stats.t.ppf``
and ``scipy.stats.norm.ppf`` call); the reference here is ``scipy.stats`` itself. Not a speed
test: the second check is *which* modules the ingest command loads (importing scipy.stats cost
about 0.3 s of the command's start, sqlite-utils about 60 ms).
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from scipy import stats

from monitor.estimators.tquantile import N_GRID, t_quantile, t_table


@pytest.mark.parametrize("level", [0.5, 0.8, 0.9, 0.95, 0.99, 0.999])
def test_table_equals_scipy_stats_to_the_bit(level):
    u = np.linspace(0.0, 1.0, N_GRID)
    prob = 0.5 + level / 2.0
    want = np.r_[stats.norm.ppf(prob), stats.t.ppf(prob, 1.0 / u[1:])]
    got = t_table(level)
    assert got.shape == want.shape
    assert np.array_equal(got.view(np.int64), want.view(np.int64))
    for df in (1.0, 2.0, 4.0, 40000.0):             # grid points: the lookup is the table's
        assert t_quantile(level, df) == stats.t.ppf(prob, df)


def test_ingest_command_imports_neither_scipy_stats_nor_sqlite_utils_nor_optimize(tmp_path):
    log = tmp_path / "feed.csv"
    log.write_text("series,ts,price,quantity\n" + "".join(
        f"s{i % 3},2024-01-01T{i // 3:02d}:00:00Z,{2 + i % 5},{10 + i % 7}\n" for i in range(60)))
    code = ("import sys\n"
            "from monitor.cli import main\n"
            f"sys.argv = ['elmon', 'ingest', {str(log)!r}, '--db', "
            f"{str(tmp_path / 'store.sqlite')!r}]\n"
            "try:\n    main()\nexcept SystemExit:\n    pass\n"
            "print('scipy.stats' in sys.modules, 'sqlite_utils' in sys.modules, "
            "'scipy.optimize' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=300, check=True)          # hang guard only
    assert "60 rows" in out.stdout                          # the command ran
    # scipy.optimize too (monitor.detectors.arl imports brentq where it solves a threshold:
    # 0.15-0.45 s of the start, 5 December 2026)
    assert out.stdout.split()[-3:] == ["False", "False", "False"]
    # what they were imported for still works: the wrapped database, the status names
    from monitor.store import Store
    store = Store.open(tmp_path / "store.sqlite")
    try:
        assert store.db["observations"].count == 60 and store.schema_version() > 0
    finally:
        store.close()
    # the names monitor.experiments reads from its status module when first used
    from monitor.experiments import VERDICTS, evaluate
    from monitor.experiments.status import VERDICTS as V2, evaluate as e2
    assert VERDICTS is V2 and evaluate is e2
