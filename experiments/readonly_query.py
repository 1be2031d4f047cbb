"""Read-only SQL over a results folder, with DuckDB (behind :func:`.store.query`).

(Not named ``query``: ``propensim.experiments.query`` is the function, exported lazily, and a
submodule of that name would replace it on the package once imported.)

A query is a look at one folder's tables, never a change to the folder nor a way to read other
files. Two layers keep it so:

1. DuckDB itself opens no file. Each table is handed to it as a pyarrow dataset over exactly the
   folder's own Parquet files (``runs.parquet``, ``timings.parquet``, ``failures.parquet``,
   ``rounds/part-*.parquet``, ...), registered as a view. Then, before the SQL runs, the
   connection is switched to ``enable_external_access = false`` (no file, network or extension
   access: ``COPY ... TO``, ``ATTACH`` of a file, ``EXPORT DATABASE``, ``read_csv('/etc/passwd')``,
   ``INSTALL``), extensions are neither installed nor loaded automatically, Python variables are
   not scanned by name (``python_enable_replacements = false``), spills of large sorts go to a
   private temporary folder removed afterwards, and ``lock_configuration = true`` makes every
   later ``SET`` or ``RESET`` fail, so none of this can be switched back.
2. The SQL is parsed first, and every statement must be a ``SELECT`` (which includes ``WITH``,
   ``VALUES``, ``FROM``-first queries, ``DESCRIBE``, ``SHOW`` and ``SUMMARIZE``). Anything else
   (``COPY``, ``CREATE``, ``INSERT``, ``ATTACH``, ``INSTALL``, ``LOAD``, ``SET``, ``PRAGMA``,
   ``CALL`` ...) is refused before any statement runs, with a one-line :class:`StoreError` saying
   why. This also refuses what layer 1 would allow in memory only (``ATTACH ':memory:'``,
   ``LOAD`` of a built-in extension, ``CREATE TABLE`` in memory), since none of it is a read.

References
----------
DuckDB documentation, "Securing DuckDB" and "Configuration" (settings ``enable_external_access``,
``lock_configuration``, ``autoload_known_extensions``, ``autoinstall_known_extensions``,
``python_enable_replacements``, ``temp_directory``), https://duckdb.org/docs/2.0/operations_manual/
securing_duckdb/overview.html; the setting names were checked against ``duckdb_settings()`` of
DuckDB 2.0.1.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

from propensim.experiments.store import TABLES, StoreError, _one_line

#: Views over one file each, and over the part files of a table folder.
FILE_VIEWS = ("runs", "timings", "failures")
ALLOWED = "allowed: SELECT statements (also WITH, DESCRIBE, SHOW, SUMMARIZE) over the views"

#: Why a statement kind is refused (DuckDB statement type name -> what it would do).
_REFUSED = {
    "COPY": "would write a file",
    "COPY_DATABASE": "would write a database",
    "EXPORT": "would write files",
    "INSERT": "would write",
    "UPDATE": "would write",
    "DELETE": "would write",
    "MERGE_INTO": "would write",
    "CREATE": "would create an object",
    "CREATE_FUNC": "would create an object",
    "DROP": "would drop an object",
    "ALTER": "would change an object",
    "VACUUM": "would write",
    "ANALYZE": "would write statistics",
    "ATTACH": "would attach a database",
    "DETACH": "would detach a database",
    "LOAD": "would install or load an extension",
    "EXTENSION": "would install or load an extension",
    "SET": "would change a setting",
    "VARIABLE_SET": "would change a setting",
}


def _first_line(exc: BaseException) -> str:
    """DuckDB's message without the SQL excerpt and caret it appends on later lines."""
    lines = [line for line in str(exc).splitlines() if line.strip()]
    return _one_line(lines[0]) if lines else type(exc).__name__


def _views(path: Path) -> dict[str, list[Path]]:
    """The folder's table files by view name (only the tables that exist)."""
    views: dict[str, list[Path]] = {}
    for name in FILE_VIEWS:
        fpath = path / f"{name}.parquet"
        if fpath.is_file():
            views[name] = [fpath]
    for name in TABLES:
        parts = sorted(p for p in (path / name).glob("part-*.parquet") if p.is_file())
        if parts:
            views[name] = parts
    return views


def _dataset(name: str, files: list[Path]):
    """A pyarrow dataset over ``files``, columns unified by name (missing ones are null)."""
    import pyarrow as pa
    import pyarrow.dataset as ds
    import pyarrow.parquet as pq

    try:
        schemas = [pq.read_schema(f) for f in files]
        schema = pa.unify_schemas(schemas, promote_options="permissive")
        return ds.dataset([str(f) for f in files], schema=schema, format="parquet")
    except (OSError, pa.ArrowException) as exc:
        where = files[0] if len(files) == 1 else files[0].parent
        raise StoreError(
            f"{where}: cannot read the {name} table ({type(exc).__name__}: {_one_line(exc)}); "
            "nothing was changed"
        ) from None


def _check_statements(con, sql: str, views: list[str]) -> None:
    """Refuse SQL holding anything but SELECT statements, before any of it runs."""
    import duckdb

    names = ", ".join(views) or "none stored yet"
    try:
        statements = con.extract_statements(sql)
    except duckdb.Error as exc:
        raise StoreError(f"query failed: {_first_line(exc)}") from None
    if not statements:
        raise StoreError(f"query: no SQL statement given; {ALLOWED} {names}")
    for stmt in statements:
        try:
            kind = stmt.type.name
        except ValueError:  # a kind this duckdb module cannot name (UPDATE EXTENSIONS)
            kind = "?"
        if kind == "SELECT":
            continue
        words = stmt.query.split()
        keyword = words[0].upper().rstrip(";") if words else kind
        why = _REFUSED.get(kind, "is not a SELECT")
        raise StoreError(
            f"query refused: {keyword} {why}; a query over a results folder is read-only; "
            f"{ALLOWED} {names}"
        )


def run_readonly(folder, sql: str):
    """Run ``sql`` over the tables of a results folder, read-only; a pandas DataFrame.

    The folder must be checked as a results folder by the caller (:func:`.store.query`).

    Raises
    ------
    StoreError
        One line: the SQL is not a read of the folder's views (a write, ``ATTACH``, ``INSTALL``,
        ``LOAD``, ``SET``, a read of another file), or it failed.
    """
    try:
        import duckdb
    except ImportError:
        raise StoreError("query needs DuckDB: pip install 'propensim[query]'") from None
    if not isinstance(sql, str):
        raise StoreError(f"query: the SQL must be text, got {type(sql).__name__}")
    path = Path(folder)
    views = _views(path)
    datasets = {name: _dataset(name, files) for name, files in views.items()}
    config = {
        "autoinstall_known_extensions": False,
        "autoload_known_extensions": False,
        "python_enable_replacements": False,
    }
    with tempfile.TemporaryDirectory(prefix="propensim-query-") as spill:
        con = duckdb.connect(":memory:", config=config)
        try:
            for name, dataset in datasets.items():
                con.register(name, dataset)
            con.execute("SET temp_directory = " + "'" + spill.replace("'", "''") + "'")
            con.execute("SET enable_external_access = false")
            con.execute("SET lock_configuration = true")
            _check_statements(con, sql, list(views))
            try:
                return con.execute(sql).df()
            except duckdb.PermissionException as exc:
                raise StoreError(
                    f"query refused: it opens a file; a query over {path} reads only its views "
                    f"{', '.join(views) or '(none stored yet)'} ({_first_line(exc)})"
                ) from None
            except duckdb.Error as exc:
                raise StoreError(f"query failed: {_first_line(exc)}") from None
        finally:
            con.close()
