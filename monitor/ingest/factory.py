"""Sources from configuration: one ``[sources.NAME]`` table -> a source object, and the source
of ``elmon ingest FILE``. A new source kind is its own module plus one branch here."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

from monitor.errors import ConfigError, SourceError
from monitor.ingest.files import CsvTail, FolderSource, ParquetFile
from monitor.ingest.logio import column_names
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
                            settle_s=spec.get("settle_s", 1.0),
                            last_line_wait_s=spec.get("last_line_wait_s", 300.0))
    if kind == "sql":
        return SqlSource(name, spec["table"], spec.get("key", "id"),
                         path=rel(spec["path"]) if "path" in spec else None, url=spec.get("url"),
                         columns=columns)
    raise ConfigError(f"[sources.{name}] type = {kind!r}: must be csv, folder or sql")


def sources_from_config(config, base: Path | None = None) -> dict:
    """Every ``[sources.NAME]`` as a source object, in file order."""
    columns = column_names(config)
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


_COMMON = {"type": str, "poll_interval_s": (int, float), "stale_after_s": (int, float)}


#: keys allowed per source type (besides ``type``, ``poll_interval_s``, ``stale_after_s``)
SOURCE_KEYS: dict[str, dict[str, Any]] = {
    "csv": {"path": str, "on_reset": str},
    "folder": {"path": str, "patterns": list, "settle_s": (int, float),
               "last_line_wait_s": (int, float)},
    "sql": {"path": str, "url": str, "table": str, "key": str},
}


REQUIRED_SOURCE_KEYS = {"csv": ("path",), "folder": ("path",), "sql": ("table",)}


def _type_ok(value: Any, types: Any) -> bool:
    if types == (int, float):
        return isinstance(value, (int, float)) and not isinstance(value, bool)
    return isinstance(value, types)


def check_sources(content: Any) -> None:
    """Validate ``[sources.NAME]`` tables; the message names ``sources.NAME.KEY``."""
    if not isinstance(content, Mapping):
        raise ConfigError("[sources] must be a table of named sources, e.g. [sources.feed]")
    for name, spec in content.items():
        where = f"[sources.{name}]"
        if not isinstance(spec, Mapping):
            raise ConfigError(f"{where}: expected a table of settings, got {spec!r}")
        kind = spec.get("type")
        if kind not in SOURCE_KEYS:
            raise ConfigError(f"{where} type = {kind!r}: must be one of {', '.join(SOURCE_KEYS)}")
        allowed = {**_COMMON, **SOURCE_KEYS[kind]}
        for key, value in spec.items():
            if key not in allowed:
                raise ConfigError(f"{where} {key}: unknown key for a {kind} source "
                                  f"(known: {', '.join(sorted(allowed))})")
            if not _type_ok(value, allowed[key]):
                raise ConfigError(f"{where} {key} = {value!r}: wrong type")
        for key in REQUIRED_SOURCE_KEYS[kind]:
            if key not in spec:
                raise ConfigError(f"{where} {key}: required for a {kind} source")
        if kind == "sql" and ("path" in spec) == ("url" in spec):
            raise ConfigError(f"{where}: give either path (a SQLite file) or url (SQLAlchemy)")
        if spec.get("on_reset", "restart") not in ("restart", "stop"):
            raise ConfigError(f"{where} on_reset = {spec['on_reset']!r}: must be 'restart' or "
                              f"'stop'")
        if "poll_interval_s" in spec and not spec["poll_interval_s"] > 0:
            raise ConfigError(f"{where} poll_interval_s = {spec['poll_interval_s']!r}: must be > 0")
        for key in ("stale_after_s", "settle_s", "last_line_wait_s"):
            if key in spec and not 0 <= spec[key] <= 366 * 86400:
                raise ConfigError(f"{where} {key} = {spec[key]!r}: must be a finite number of "
                                  f"seconds, 0 .. {366 * 86400} (366 days)")
        if "poll_interval_s" in spec and not spec["poll_interval_s"] <= 366 * 86400:
            raise ConfigError(f"{where} poll_interval_s = {spec['poll_interval_s']!r}: must be a "
                              f"finite number of seconds, at most {366 * 86400} (366 days)")
        patterns = spec.get("patterns", ["*"])
        if not patterns or not all(isinstance(p, str) and p.strip() for p in patterns):
            raise ConfigError(f"{where} patterns = {patterns!r}: must be a list of file name "
                              f"patterns (text), e.g. [\"*.csv\", \"*.parquet\"]")


#: the free-form ``[sources]`` table and its validator, for monitor.settings to compose
FREE_SECTIONS = {"sources": check_sources}
