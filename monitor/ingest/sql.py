"""A SQL table polled by an increasing key: SQLite built in, any database through SQLAlchemy.

See :mod:`monitor.ingest.files` for the position (``{"key": last key, "rows": rows read}``) and the
caveat on keys that commit out of order.
"""

from __future__ import annotations

import re
import sqlite3
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd

from monitor.errors import ConfigError, SourceError
from monitor.ingest.base import Chunk, canonical_names, empty_rejects


_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)?$")


class SqlSource:
    """A SQL table polled by an increasing key (see the module docstring).

    Give ``path`` (a SQLite file, opened read-only) or ``url`` (any SQLAlchemy URL; needs the
    ``sqlalchemy`` package and the database's driver).
    """

    kind = "sql"

    def __init__(self, name: str, table: str, key: str = "id", path=None, url: str | None = None,
                 columns: Mapping[str, str] | None = None):
        for what, value in (("table", table), ("key", key)):
            if not isinstance(value, str) or not _NAME.match(value):
                raise ConfigError(f"{what} = {value!r}: must be a plain SQL name (letters, "
                                  f"digits, _; optionally schema.name)")
        if (path is None) == (url is None):
            raise ConfigError("a sql source needs either path (SQLite) or url (SQLAlchemy)")
        self.name, self.table, self.key, self.columns = name, table, key, dict(columns or {})
        self.path, self.url = (Path(path) if path is not None else None), url
        self._engine = None

    def _query(self, last: Any, max_rows: int) -> pd.DataFrame:
        if self.path is not None:
            q = lambda n: ".".join(f'"{p}"' for p in n.split("."))  # noqa: E731
            where = "" if last is None else f" WHERE {q(self.key)} > ?"
            sql = f"SELECT * FROM {q(self.table)}{where} ORDER BY {q(self.key)} LIMIT ?"
            params = ([] if last is None else [last]) + [int(max_rows)]
            if not self.path.exists():
                raise SourceError(f"{self.path}: no such database file")
            uri = self.path.resolve().as_uri() + "?mode=ro"
            try:
                with sqlite3.connect(uri, uri=True, timeout=10.0) as conn:
                    cur = conn.execute(sql, params)
                    names = [d[0] for d in cur.description]
                    data = cur.fetchall()
                conn.close()
            except sqlite3.Error as exc:
                raise SourceError(f"{self.path}: table {self.table!r}: {exc}") from None
            return pd.DataFrame.from_records(data, columns=names)
        try:
            import sqlalchemy as sa
        except ImportError:
            raise ConfigError("a sql source with url needs the sqlalchemy package "
                              "(pip install 'elmon[sql]')") from None
        if self._engine is None:
            self._engine = sa.create_engine(self.url)
        prep = self._engine.dialect.identifier_preparer
        q = lambda n: ".".join(prep.quote(p) for p in n.split("."))  # noqa: E731
        where = "" if last is None else f" WHERE {q(self.key)} > :last"
        sql = sa.text(f"SELECT * FROM {q(self.table)}{where} ORDER BY {q(self.key)} LIMIT :n")
        try:
            with self._engine.connect() as conn:
                result = conn.execute(sql, {"last": last, "n": int(max_rows)})
                return pd.DataFrame(result.fetchall(), columns=list(result.keys()))
        except sa.exc.SQLAlchemyError as exc:
            raise SourceError(f"{self.url}: table {self.table!r}: {exc}") from None

    def read(self, position: dict | None, max_rows: int) -> Chunk | None:
        pos = dict(position or {})
        frame = self._query(pos.get("key"), max_rows)
        if not len(frame):
            return None
        if self.key not in frame.columns:
            raise SourceError(f"table {self.table!r} has no key column {self.key!r}")
        last = frame[self.key].iloc[-1]
        last = last.item() if hasattr(last, "item") else last
        rows = int(pos.get("rows", 0))
        frame.columns = canonical_names(list(frame.columns), self.columns)
        rownums = np.arange(rows + 1, rows + len(frame) + 1, dtype=np.int64)
        return Chunk(frame, rownums, empty_rejects(), {"key": last, "rows": rows + len(frame)},
                     len(frame))
