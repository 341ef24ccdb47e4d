"""Sources from configuration: one ``[sources.NAME]`` table -> a source object, and the source
of ``elmon ingest FILE``. A new source kind is its own module plus one branch here."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

from monitor.errors import ConfigError, SourceError
from monitor.ingest.files import CsvTail, FolderSource, ParquetFile
from monitor.ingest.sql import SqlSource


def source_from_config(name: str, spec: Mapping[str, Any], columns=None, base: Path | None = None):
    """Build one source from its ``[sources.NAME]`` table (paths relative to ``base``)."""
    spec = dict(spec)
    kind = spec.pop("type")
    for key in ("poll_interval_s", "stale_after_s"):
        spec.pop(key, None)

    def rel(p):
        p = Path(p).expanduser()
        return p if p.is_absolute() or base is None else base / p
    if kind == "csv":
        return CsvTail(name, rel(spec["path"]), columns, on_reset=spec.get("on_reset", "restart"))
    if kind == "folder":
        return FolderSource(name, rel(spec["path"]), columns,
                            patterns=spec.get("patterns", ("*.csv", "*.parquet", "*.pq")),
                            settle_s=spec.get("settle_s", 1.0))
    if kind == "sql":
        return SqlSource(name, spec["table"], spec.get("key", "id"),
                         path=rel(spec["path"]) if "path" in spec else None, url=spec.get("url"),
                         columns=columns)
    raise ConfigError(f"[sources.{name}] type = {kind!r}: must be csv, folder or sql")


def sources_from_config(config, base: Path | None = None) -> dict:
    """Every ``[sources.NAME]`` as a source object, in file order."""
    columns = config.section("columns")
    return {name: source_from_config(name, spec, columns, base)
            for name, spec in config.section("sources").items()}


def file_source(path, columns=None) -> tuple[str, Any]:
    """The source of ``elmon ingest FILE``: named by the file's absolute path.

    A CSV is read as a complete file (its end ends the last line); a Parquet file as a
    one-file folder would be, by row offset.
    """
    p = Path(path).resolve()
    if not p.exists():
        raise SourceError(f"{path}: no such file")
    if p.suffix.lower() in (".parquet", ".pq"):
        return str(p), ParquetFile(str(p), p, columns)
    return str(p), CsvTail(str(p), p, columns, final=True)
