"""Key columns keep their text (issue 19): a store or SKU code "007" stays "007" through the
typed CSV reader, the block reader, replay and ingest (it became the number 7, merging "007"
with "7"). Expected values are the strings written into each file."""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor.cli import main
from monitor.ingest.chunks import Block, csv_blocks, csv_header, read_csv_block
from monitor.ingest.logio import read_log
from tests.service_helpers import frame as store_frame


def write_log(path, stores=("007", "7", "010"), n=40, seed=3):
    """Two key columns (sku, store) with leading zeros, b = -1.5 (invented items)."""
    rng = np.random.default_rng(seed)
    lines = ["sku,store,ts,price,quantity,promo"]
    for store in stores:
        for i in range(n):
            p = float(np.exp(rng.normal(0, 0.2)))
            q = float(np.exp(2.0 - 1.5 * np.log(p) + rng.normal(0, 0.1)))
            lines.append(f"0042,{store},2024-01-{1 + i // 24:02d}T{i % 24:02d}:00:00Z,"
                         f"{p:.4f},{q:.4f},{i % 2}")
    path.write_text("\n".join(lines) + "\n")
    return path


def test_the_typed_reader_keeps_leading_zeros_and_types_the_rest(tmp_path):
    log = write_log(tmp_path / "log.csv", n=3)
    frame = read_log(log)
    assert frame["store"].tolist() == ["007"] * 3 + ["7"] * 3 + ["010"] * 3
    assert set(frame["sku"]) == {"0042"}
    assert frame["price"].dtype == np.float64 and frame["quantity"].dtype == np.float64
    assert frame["promo"].dtype == np.int64           # 0 and 1: no leading zero, a number


def test_the_block_reader_keeps_leading_zeros(tmp_path):
    log = write_log(tmp_path / "log.csv", n=3)
    header = csv_header(log)
    blocks = csv_blocks(log, block_bytes=4096)
    got = pd.concat([read_csv_block(log, b, header) for b in blocks], ignore_index=True)
    assert got["store"].tolist() == ["007"] * 3 + ["7"] * 3 + ["010"] * 3
    assert isinstance(blocks[0], Block)


def test_replay_and_ingest_keep_007_apart_from_7(tmp_path, capsys):
    log = write_log(tmp_path / "log.csv")
    out = tmp_path / "out"
    assert main(["replay", str(log), "--series-col", "sku", "--series-col", "store",
                 "--out", str(out)]) == 0
    est = pd.read_csv(out / "estimates.csv", dtype={"series": str})
    assert sorted(est["series"].unique()) == ["0042/007", "0042/010", "0042/7"]
    db = tmp_path / "s.sqlite"
    assert main(["ingest", str(log), "--db", str(db), "--series-col", "sku",
                 "--series-col", "store", "--quiet"]) == 0
    obs = store_frame(db, "SELECT series, COUNT(*) AS n FROM observations GROUP BY series")
    assert dict(zip(obs["series"], obs["n"])) == {"0042/007": 40, "0042/010": 40, "0042/7": 40}
