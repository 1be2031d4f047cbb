"""The results folder of one experiment: crash-safe, resumable, queryable.

Layout of a folder::

    manifest.json          spec (resolved), fingerprint, versions, command, seed, times, counts
    spec.toml              the resolved spec, loadable again with ``propensim run``
    runs.parquet           one row per run: ids, seeds, design parameters, summary metrics, status
    timings.parquet        wall-clock seconds and worker of each run (kept apart: see below)
    .lock                  held (flock) while a sweep writes, so two sweeps cannot share a folder
    failures.parquet       error type, message and traceback of every run that failed
    rounds/part-NNNNN.parquet   round tables of many runs each, with a ``run_id`` column
    traders/, ledger/      likewise, when the spec collects them
    totals/                each trader's surplus over the run with its groups (collect.totals)
    meetings/              every meeting, traded or not (collect.meetings)
    comparison.csv         paired arm comparisons (written by ``propensim run`` / ``compare``)

Crash safety. Every file is written whole to a temporary file in the same folder, flushed to disk
(``fsync``) and moved into place with ``os.replace``, which is atomic on POSIX: a reader sees the
old file or the new one, never half of one. Per flush, part files are written first and
``runs.parquet`` last, so ``runs.parquet`` is the commit record. On resume, a part file holding any
run that ``runs.parquet`` does not list as ``ok`` belongs to a flush that was killed mid-way; it is
deleted, and the run is done again. Nothing is duplicated and no completed run is lost.

Determinism. ``runs.parquet`` is sorted by run index, written with a schema fixed from the whole
plan list and without pandas metadata, so the same experiment gives the same bytes whichever
backend, worker count or order of completion produced it, and after any number of resumes. This
is why wall-clock durations and worker names are not columns of the runs table, as one might
expect, but live in ``timings.parquet``: they differ on every execution. :func:`load` joins them
back onto ``Results.runs``.

A folder that is not ours, or whose manifest or tables cannot be read, is refused with a one-line
:class:`StoreError` naming the file, and nothing in it is touched.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import json
import os
import platform
import sys
import warnings
from collections.abc import Iterable, Sequence
from functools import cached_property
from pathlib import Path
from typing import Any

FORMAT = "propensim-results"
FORMAT_VERSION = 1
TABLES = ("rounds", "traders", "ledger", "totals", "meetings")
PACKAGES = ("propensim", "numpy", "scipy", "mesa", "networkx", "pandas", "pyarrow")

#: Columns of runs.parquet before the design parameters and after them (metrics come between).
ID_COLUMNS = ("run_id", "index", "arm", "point", "replicate", "seed_entropy", "seed_key")
STATUS_COLUMNS = ("status", "error_type", "error_message")
TIMING_COLUMNS = ("run_id", "index", "status", "duration_s", "worker", "finished")
FAILURE_COLUMNS = ("run_id", "index", "error_type", "error_message", "traceback")


class StoreError(ValueError):
    """A results folder that cannot be used as asked (one-line message naming the file)."""


# -- small helpers -------------------------------------------------------------------------
def _now() -> str:
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _fsync_dir(folder: Path) -> None:
    with contextlib.suppress(OSError):  # not every file system lets a directory be opened
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically: temp file in the same folder, fsync, os.replace."""
    path = Path(path)
    tmp = path.with_name(f".tmp-{path.name}-{os.getpid()}")
    try:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):  # no temporary file left behind
            tmp.unlink()
        raise
    _fsync_dir(path.parent)


def shown_path(path) -> str:
    """A path as a message shows it: plain, or quoted with escapes when it has odd characters.

    A name of whitespace or control characters (a line separator) would print as nothing.
    """
    text = str(path)
    plain = text and text.isprintable() and text.strip() == text and " " not in text
    return text if plain else repr(text)


def _parquet_bytes(table) -> bytes:
    import pyarrow as pa
    import pyarrow.parquet as pq

    sink = pa.BufferOutputStream()
    pq.write_table(table, sink)
    return sink.getvalue().to_pybytes()


def _n_rows(table) -> int:
    """Rows of a table that is a DataFrame or a column dict (name -> array)."""
    if isinstance(table, dict):
        return len(next(iter(table.values()))) if table else 0
    return len(table)


#: numpy kinds whose arrays arrow takes as they are, with the types pandas would give them.
_PLAIN_KINDS = "biuf"


def _arrow_columns(run_id: str, columns):
    """A column dict as an arrow table with ``run_id`` first, typed as the pandas path types it.

    Without pandas (the sweep's tables arrive as column dicts): run_id is a ``large_string``
    column, numbers and booleans keep their numpy types. None for a DataFrame or for columns
    of other kinds (strings, objects): those go the pandas way (:func:`_pandas_part`).
    """
    import numpy as np
    import pyarrow as pa

    if not isinstance(columns, dict):
        return None
    arrays = {k: np.asarray(v) for k, v in columns.items()}
    if any(a.ndim != 1 or a.dtype.kind not in _PLAIN_KINDS for a in arrays.values()):
        return None
    n = _n_rows(columns)
    run = pa.array([run_id] * n, pa.large_string())
    return pa.table({"run_id": run, **{k: pa.array(a) for k, a in arrays.items()}})


def _pandas_part(frames: list):
    """Several runs' tables as one arrow table through pandas (the reference typing)."""
    import pandas as pd
    import pyarrow as pa

    parts = []
    for run_id, frame in frames:
        f = pd.DataFrame(frame) if isinstance(frame, dict) else frame.reset_index(drop=True)
        f.insert(0, "run_id", run_id)
        parts.append(f)
    return pa.Table.from_pandas(pd.concat(parts, ignore_index=True), preserve_index=False)


def _read_table(path: Path, columns: Sequence[str] | None = None):
    import pyarrow.parquet as pq

    try:
        return pq.read_table(path, columns=list(columns) if columns else None)
    except Exception as exc:
        raise StoreError(
            f"{path}: cannot read this Parquet file ({type(exc).__name__}: {_one_line(exc)}); "
            "nothing was changed"
        ) from None


def package_versions() -> dict[str, str]:
    """Installed versions of the packages a result depends on (without importing them)."""
    from importlib import metadata

    out = {}
    for name in PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    out["python"] = platform.python_version()
    return out


def plans_fingerprint(plans: Iterable) -> str:
    """sha256 of the plans themselves, for sweeps built without a spec."""
    from propensim.experiments.plan import canonical_json

    text = canonical_json([p.to_dict() for p in plans])
    return hashlib.sha256(text.encode()).hexdigest()


def _json_safe(obj):
    """Plain JSON: non-finite floats become the strings "inf", "-inf", "nan"."""
    if isinstance(obj, float) and obj != obj:
        return "nan"
    if isinstance(obj, float) and obj in (float("inf"), float("-inf")):
        return "inf" if obj > 0 else "-inf"
    if isinstance(obj, dict):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_json_safe(v) for v in obj]
    if obj is None or isinstance(obj, bool | int | float | str):
        return obj
    if hasattr(obj, "item"):  # numpy scalar
        return _json_safe(obj.item())
    return str(obj)


# -- the runs table schema -----------------------------------------------------------------
def _value_kind(values: list) -> str:
    present = [v for v in values if v is not None]
    if not present:
        return "float"
    if all(isinstance(v, bool) for v in present):
        return "bool"
    if all(isinstance(v, int) and not isinstance(v, bool) for v in present):
        return "int" if all(-(2**63) <= v < 2**63 for v in present) else "str"
    if all(isinstance(v, int | float) and not isinstance(v, bool) for v in present):
        return "float"
    return "str"


def _as_kind(value, kind: str):
    if value is None:
        return None
    if kind == "str":
        if isinstance(value, str):
            return value
        from propensim.experiments.plan import canonical_json

        return canonical_json(value)
    if kind == "float":
        return float(value)
    return value


_ARROW_TYPES = {"bool": "bool_", "int": "int64", "float": "float64", "str": "string"}


class _RunsSchema:
    """Columns and types of runs.parquet, fixed from the whole plan list.

    So every flush, every backend and every resume writes the same schema.
    """

    def __init__(self, plans: Sequence, metrics: Sequence[str]) -> None:
        params: list[str] = []
        for plan in plans:
            params.extend(k for k in plan.params if k not in params)
        self.params = params
        self.param_kinds = {k: _value_kind([p.params.get(k) for p in plans]) for k in params}
        self.metrics = list(metrics)
        self.seed_kind = _value_kind([p.seed_entropy for p in plans])
        if self.seed_kind == "float":  # only None or float entropies: not a valid seed anyway
            self.seed_kind = "str"
        self.columns = [*ID_COLUMNS, *params, *self.metrics, *STATUS_COLUMNS]
        if len(set(self.columns)) != len(self.columns):
            seen: set[str] = set()
            dup = next(c for c in self.columns if c in seen or seen.add(c))
            raise StoreError(f"column {dup!r} would appear twice in runs.parquet; rename it")

    def arrow(self):
        import pyarrow as pa

        fields = [
            pa.field("run_id", pa.string()),
            pa.field("index", pa.int64()),
            pa.field("arm", pa.string()),
            pa.field("point", pa.int64()),
            pa.field("replicate", pa.int64()),
            pa.field("seed_entropy", getattr(pa, _ARROW_TYPES[self.seed_kind])()),
            pa.field("seed_key", pa.list_(pa.int64())),
        ]
        fields += [
            pa.field(k, getattr(pa, _ARROW_TYPES[self.param_kinds[k]])()) for k in self.params
        ]
        fields += [pa.field(m, pa.float64()) for m in self.metrics]
        fields += [pa.field(c, pa.string()) for c in STATUS_COLUMNS]
        return pa.schema(fields)

    def row(self, plan, result) -> dict[str, Any]:
        ok = result.status == "ok"
        row: dict[str, Any] = {
            "run_id": plan.run_id,
            "index": int(plan.index),
            "arm": str(plan.arm),
            "point": int(plan.point),
            "replicate": int(plan.replicate),
            "seed_entropy": _as_kind(plan.seed_entropy, self.seed_kind),
            "seed_key": [int(k) for k in plan.seed_key],
        }
        for k in self.params:
            row[k] = _as_kind(plan.params.get(k), self.param_kinds[k])
        for m in self.metrics:
            row[m] = float(result.summary[m]) if ok and m in result.summary else None
        row["status"] = result.status
        row["error_type"] = None if ok else result.error_type
        row["error_message"] = None if ok else result.error_message
        return row


# -- the store -----------------------------------------------------------------------------
class Store:
    """One experiment's results folder, open for writing (use :func:`load` to read one).

    Use :meth:`create` to start or resume a sweep; the runner adds results with :meth:`add` and
    commits them with :meth:`flush`. Rows are kept per run index; a run is identified by its
    ``run_id`` (a hash of configuration, rounds, seed and what is collected), so two plans with
    the same ``run_id`` are computed once and both rows filled from the one result.
    """

    def __init__(self, path: Path, manifest: dict[str, Any]) -> None:
        self.path = Path(path)
        self.manifest = manifest
        self.warnings: dict[str, int] = {}
        self.comparison = None  # the paired comparison table, when the runner computed one
        self._schema: _RunsSchema | None = None
        self._plans: dict[str, list] = {}
        self._rows: dict[int, dict[str, Any]] = {}
        self._timings: dict[str, dict[str, Any]] = {}
        self._failures: dict[str, dict[str, Any]] = {}
        self._buffer: dict[str, list] = {t: [] for t in TABLES}
        self._dirty = False
        self._next_part: dict[str, int] = {}
        self._part_ids: dict[Path, set[str]] = {}
        self.last_flush_seconds = 0.0

    # -- opening ---------------------------------------------------------------------------
    @classmethod
    def create(
        cls,
        path,
        *,
        plans: Sequence,
        metrics: Sequence[str],
        fingerprint: str,
        name: str,
        spec: dict[str, Any] | None = None,
        spec_toml: str | None = None,
        root_seed=None,
        command: Sequence[str] | None = None,
        backend: dict[str, Any] | None = None,
    ) -> Store:
        """Start a new results folder, or resume the one at ``path`` if it holds this experiment.

        Raises
        ------
        StoreError
            If the folder holds a different experiment (fingerprint differs), is not a
            propensim results folder, or a stored file cannot be read. Nothing is changed then.
        """
        path = Path(path)
        if "\x00" in str(path) or not str(path).strip():
            raise StoreError(
                f"{shown_path(path)}: not a usable folder name (blank, or a NUL character in it); "
                "choose another results folder (--out)"
            )
        mpath = path / "manifest.json"
        if path.exists() and not path.is_dir():
            raise StoreError(f"{path}: exists and is not a folder; choose a new results folder")
        resumed = mpath.exists()
        old: dict[str, Any] = {}
        inputs = _plan_inputs(plans)
        if resumed:
            old = _read_manifest(path)
            if old.get("fingerprint") != fingerprint or (old.get("inputs") or {}) != inputs:
                _check_growth(path, old, spec, inputs, fingerprint)
        elif path.exists() and any(p.name != ".lock" for p in path.iterdir()):
            raise StoreError(
                f"{path}: not a propensim results folder (no manifest.json) and not empty; "
                "choose a new folder"
            )
        store = cls(path, {})
        store._schema = _RunsSchema(plans, metrics)
        for plan in plans:
            store._plans.setdefault(plan.run_id, []).append(plan)
        path.mkdir(parents=True, exist_ok=True)
        store._lock()
        try:
            # Read everything stored before changing anything.
            if resumed:
                store._read_existing(plans)
            store._clean_partial_parts()
        except BaseException:
            store._unlock()
            raise
        now = _now()
        versions = package_versions()
        earlier = list(old.get("earlier_versions") or [])
        before = (old.get("versions") or {}).get("propensim")
        if resumed and before and before != versions.get("propensim"):
            earlier.append(old["versions"])
            warnings.warn(
                f"{shown_path(path)}: resuming runs made with propensim {before} under "
                f"{versions.get('propensim')}; the same seed need not give the same draws in two "
                "versions (the manifest keeps the earlier versions under earlier_versions)",
                RuntimeWarning,
                stacklevel=2,
            )
        manifest = {
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "name": name,
            "fingerprint": fingerprint,
            "root_seed": root_seed,
            "spec": spec,
            "versions": versions,
            **({"earlier_versions": earlier} if earlier else {}),
            "command": list(command) if command is not None else list(sys.argv),
            "platform": platform.platform(),
            "created": old.get("created", now),
            "started": now,
            "finished": None,
            "status": "running",
            "sessions": int(old.get("sessions", 0)) + 1,
            "backend": backend or {},
            "metrics": list(metrics),
            "metric_descriptions": _metric_descriptions(metrics),
            "parameters": list(store._schema.params),
            **({"inputs": inputs} if inputs else {}),
            "counts": store.counts(),
        }
        store.manifest = manifest
        store._write_manifest()
        if spec_toml is not None:
            atomic_write_bytes(path / "spec.toml", spec_toml.encode())
        return store

    def _read_existing(self, plans: Sequence) -> None:
        schema = self._schema
        runs_path = self.path / "runs.parquet"
        if runs_path.exists():
            table = _read_table(runs_path)
            if table.schema.names != schema.columns:
                raise StoreError(
                    f"{runs_path}: its columns do not match this spec's; "
                    "use a new folder (--out) for this spec"
                )
            # Rows are matched by run id, not position: an experiment that grew (more
            # replicates or samples) puts its completed runs at new indices.
            for row in table.to_pylist():
                same = self._plans.get(row["run_id"])
                if not same:
                    raise StoreError(
                        f"{runs_path}: run {row['index']} does not belong to this spec; "
                        "use a new folder (--out)"
                    )
                for plan in same:
                    self._rows[int(plan.index)] = {**row, "index": int(plan.index)}
        for fname, target in (
            ("timings.parquet", self._timings),
            ("failures.parquet", self._failures),
        ):
            fpath = self.path / fname
            if fpath.exists():
                for row in _read_table(fpath).to_pylist():
                    target[row["run_id"]] = row
        ok = self.ok_ids()
        self._failures = {k: v for k, v in self._failures.items() if k not in ok}
        for target in (self._timings, self._failures):  # first index in this spec's order
            for run_id in [k for k in target if k not in self._plans]:
                del target[run_id]
            for run_id, row in target.items():
                row["index"] = min(int(p.index) for p in self._plans[run_id])
        # Check every part file reads before deleting any of them.
        for table_name in TABLES:
            for part in sorted((self.path / table_name).glob("part-*.parquet")):
                ids = _read_table(part, ["run_id"]).column("run_id").to_pylist()
                self._part_ids[part] = set(ids)

    def _clean_partial_parts(self) -> None:
        # A part holding a run that runs.parquet does not list as ok was written by a flush
        # that died before committing runs.parquet: delete it. Should such a part also hold
        # committed runs (never written so by this store), those runs lose rows and are redone.
        ok = self.ok_ids()
        lost: set[str] = set()
        doomed: set[Path] = set()
        changed = True
        while changed:
            changed = False
            for part, ids in self._part_ids.items():
                if part not in doomed and not ids <= ok - lost:
                    doomed.add(part)
                    lost |= ids & ok
                    changed = True
        if lost:  # uncommit those runs first, then delete their data
            self._rows = {i: r for i, r in self._rows.items() if r["run_id"] not in lost}
            for run_id in lost:
                self._timings.pop(run_id, None)
            self._write_runs()
        for part in sorted(doomed):
            part.unlink()
        for tmp in self.path.glob(".tmp-*"):
            tmp.unlink()
        for table_name in TABLES:
            for tmp in (self.path / table_name).glob(".tmp-*"):
                tmp.unlink()
            numbers = [
                int(p.stem.split("-")[1])
                for p in (self.path / table_name).glob("part-*.parquet")
                if p.stem.split("-")[1].isdigit()
            ]
            self._next_part[table_name] = max(numbers, default=-1) + 1

    # -- what is done ----------------------------------------------------------------------
    def ok_ids(self) -> set[str]:
        """``run_id`` of every run stored with status ``ok``."""
        return {r["run_id"] for r in self._rows.values() if r["status"] == "ok"}

    def pending(self, plans: Sequence) -> list:
        """Plans still to run: not stored as ``ok`` (failed runs are tried again)."""
        ok = self.ok_ids()
        return [p for p in plans if p.run_id not in ok]

    def counts(self) -> dict[str, int]:
        """Runs planned, distinct run ids, and how many are stored ok, failed, or still pending."""
        n = sum(len(v) for v in self._plans.values())
        ok = sum(r["status"] == "ok" for r in self._rows.values())
        failed = sum(r["status"] == "failed" for r in self._rows.values())
        return {
            "runs": n,
            "distinct": len(self._plans),
            "ok": ok,
            "failed": failed,
            "pending": n - ok - failed,
        }

    # -- writing ---------------------------------------------------------------------------
    def add(self, result) -> int:
        """Take one run result (buffered until :meth:`flush`); returns how many rows it fills."""
        plans = self._plans.get(result.run_id)
        if not plans:
            raise StoreError(f"run {result.run_id} is not part of this experiment")
        for plan in plans:
            self._rows[int(plan.index)] = self._schema.row(plan, result)
        first = min(p.index for p in plans)
        self._timings[result.run_id] = {
            "run_id": result.run_id,
            "index": int(first),
            "status": result.status,
            "duration_s": float(result.duration),
            "worker": result.worker,
            "finished": result.finished,
        }
        if result.status == "ok":
            self._failures.pop(result.run_id, None)
            for name in TABLES:
                frame = getattr(result, name)
                if frame is not None and _n_rows(frame):
                    self._buffer[name].append((result.run_id, frame))
        else:
            self._failures[result.run_id] = {
                "run_id": result.run_id,
                "index": int(first),
                "error_type": result.error_type,
                "error_message": result.error_message,
                "traceback": result.traceback,
            }
        for msg in result.warnings:
            self.warnings[msg] = self.warnings.get(msg, 0) + len(plans)
        self._dirty = True
        return len(plans)

    def flush(self) -> None:
        """Commit buffered results: part files first, then timings, failures and runs.parquet."""
        if not self._dirty:
            return
        import time

        t0 = time.perf_counter()
        for name in TABLES:
            if self._buffer[name]:
                self._write_part(name, self._buffer[name])
                self._buffer[name] = []
        self._write_rows("timings.parquet", self._timings.values(), TIMING_COLUMNS)
        self._write_rows("failures.parquet", self._failures.values(), FAILURE_COLUMNS)
        self._write_runs()
        self._dirty = False
        self.last_flush_seconds = time.perf_counter() - t0

    def _write_part(self, name: str, frames: list) -> None:
        import pyarrow as pa

        folder = self.path / name
        folder.mkdir(exist_ok=True)
        arrow = [_arrow_columns(run_id, frame) for run_id, frame in frames]
        if any(t is None for t in arrow):  # a DataFrame, or columns arrow would type otherwise
            table = _pandas_part(frames)
        else:
            table = pa.concat_tables(arrow)
        number = self._next_part[name]
        self._next_part[name] = number + 1
        atomic_write_bytes(folder / f"part-{number:05d}.parquet", _parquet_bytes(table))

    def _write_rows(self, fname: str, rows: Iterable[dict], columns: Sequence[str]) -> None:
        import pyarrow as pa

        rows = sorted(rows, key=lambda r: r["index"])
        table = pa.table({c: [r[c] for r in rows] for c in columns}) if rows else None
        if table is None:
            if not (self.path / fname).exists():
                return
            import pyarrow as pa

            table = pa.table({c: pa.array([], pa.string()) for c in columns})
        atomic_write_bytes(self.path / fname, _parquet_bytes(table))

    def _write_runs(self) -> None:
        import pyarrow as pa

        # Sorted by run index, with a schema fixed from the whole plan list and no pandas
        # metadata: the same runs give the same bytes whichever backend or worker computed them.
        rows = [self._rows[i] for i in sorted(self._rows)]
        schema = self._schema.arrow()
        table = pa.Table.from_pylist(rows, schema=schema)
        atomic_write_bytes(self.path / "runs.parquet", _parquet_bytes(table))

    def _write_manifest(self) -> None:
        text = json.dumps(_json_safe(self.manifest), indent=2, allow_nan=False) + "\n"
        atomic_write_bytes(self.path / "manifest.json", text.encode())

    def _lock(self) -> None:
        self._lock_file = None
        try:
            import fcntl
        except ImportError:  # not POSIX: no lock
            return
        f = open(self.path / ".lock", "a+")  # noqa: SIM115 - held until finish()
        try:
            fcntl.flock(f.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            f.close()
            raise StoreError(
                f"{self.path}: another propensim sweep is writing into this folder; "
                "wait for it or use a new folder"
            ) from None
        self._lock_file = f

    def _unlock(self) -> None:
        f = getattr(self, "_lock_file", None)
        if f is not None:
            f.close()  # closing releases the flock
            self._lock_file = None

    def finish(self, status: str = "complete") -> None:
        """Flush, and record the end time, status and counts in the manifest."""
        try:
            self.flush()
            self.manifest["finished"] = _now()
            self.manifest["status"] = status
            self.manifest["counts"] = self.counts()
            self._write_manifest()
        finally:
            self._unlock()

    def write_text(self, fname: str, text: str) -> Path:
        """Write a derived text file (e.g. comparison.csv) into the folder, atomically."""
        target = self.path / fname
        atomic_write_bytes(target, text.encode())
        return target

    # -- reading ---------------------------------------------------------------------------
    def load(self) -> Results:
        """The stored results (see :func:`load`)."""
        return load(self.path)

    def query(self, sql: str):
        """Run DuckDB SQL over the stored tables (see :func:`query`)."""
        return query(self.path, sql)

    def __repr__(self) -> str:
        return f"Store({str(self.path)!r}, counts={self.counts()})"


def _metric_descriptions(metrics: Sequence[str]) -> dict[str, str]:
    """Each metric column's meaning, unit and aggregation over a run (registered ones only)."""
    from propensim.experiments.compare import metric_notes

    return dict(note.split(": ", 1) for note in metric_notes(metrics))


def _plan_inputs(plans: Sequence) -> dict[str, str]:
    """``{path: sha256}`` of every input file the plans read (their ``config["inputs"]``)."""
    out: dict[str, str] = {}
    for plan in plans:
        out.update((plan.config or {}).get("inputs") or {})
    return dict(sorted(out.items()))


#: Fields an experiment may change and still resume into its folder: they add runs (more
#: replicates; more points of a random or Sobol' design, whose first points stay the same) or
#: change no run (the description, the run limit).
GROWABLE = ("experiment.replicates", "design.samples", "design.max_runs", "experiment.description")


def _flat(doc: Any, prefix: str = "") -> dict[str, Any]:
    if isinstance(doc, dict):
        out: dict[str, Any] = {}
        for k, v in doc.items():
            key = f"{prefix}.{k}" if prefix else str(k)
            out.update(_flat(v, key) if isinstance(v, dict) and v else {key: v})
        return out
    return {prefix: doc}


def spec_changes(old: dict | None, new: dict | None) -> list[tuple[str, Any, Any]]:
    """``(dotted field, old value, new value)`` of every field two resolved specs differ in."""
    a, b = _flat(old or {}), _flat(new or {})
    missing = object()
    out = []
    for key in [*a, *(k for k in b if k not in a)]:
        va, vb = a.get(key, missing), b.get(key, missing)
        if va != vb:
            out.append((key, None if va is missing else va, None if vb is missing else vb))
    return out


def _short(value: Any) -> str:
    text = json.dumps(_json_safe(value)) if not isinstance(value, str) else repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _check_growth(path: Path, old: dict, spec: dict | None, inputs: dict, fingerprint: str):
    """Refuse a changed spec, naming what changed, unless it only grows the experiment."""
    if spec is None or old.get("spec") is None:
        raise StoreError(
            f"{path} holds results of a different spec (fingerprint "
            f"{str(old.get('fingerprint'))[:12]} != {fingerprint[:12]}); "
            "use a new folder (--out) for a changed spec"
        )
    changes = spec_changes(old["spec"], _json_safe(spec))  # the manifest holds it JSON-safe
    old_inputs = old.get("inputs") or {}
    for file in dict.fromkeys([*old_inputs, *inputs]):
        if old_inputs.get(file) != inputs.get(file):
            was, now = old_inputs.get(file), inputs.get(file)
            what = "content changed" if was and now else ("new" if now else "no longer read")
            changes.append((f"input file {file}", was, now, what))
    refused = []
    kind = (spec.get("design") or {}).get("kind")
    for change in changes:
        key, was, now = change[:3]
        if len(change) == 4:
            refused.append(f"{key} ({change[3]})")
            continue
        shrinks = key in ("experiment.replicates", "design.samples") and (
            not isinstance(was, int) or not isinstance(now, int) or now < was
        )
        lhs = key == "design.samples" and kind not in ("random", "sobol")
        if key not in GROWABLE or shrinks or lhs:
            why = " (fewer than stored)" if shrinks else ""
            why += f" (a {kind} design of another size has other points)" if lhs else ""
            refused.append(f"{key}: {_short(was)} -> {_short(now)}{why}")
    if refused or not changes:
        listed = "; ".join(refused) if refused else "the run plans"
        raise StoreError(
            f"{path} holds results of a different spec; changed: {listed}; use a new folder "
            "(--out) for a changed spec (only more experiment.replicates, or more design.samples "
            "of a random or sobol design, grow an experiment in place)"
        )


def _read_manifest(path: Path) -> dict[str, Any]:
    mpath = Path(path) / "manifest.json"
    try:
        manifest = json.loads(mpath.read_text())
    except FileNotFoundError:
        raise StoreError(f"{path}: not a propensim results folder (no manifest.json)") from None
    except (OSError, ValueError) as exc:
        raise StoreError(
            f"{mpath}: cannot read the manifest ({type(exc).__name__}: {_one_line(exc)}); "
            "nothing was changed"
        ) from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise StoreError(f"{mpath}: not a propensim results manifest; nothing was changed")
    return manifest


# -- reading a folder ----------------------------------------------------------------------
class Results:
    """Stored results of one experiment, as pandas DataFrames (tables load on first access).

    Attributes
    ----------
    runs : DataFrame
        One row per run (see the module docstring), joined with ``duration_s`` and ``worker``
        from timings.parquet.
    rounds, traders, ledger : DataFrame
        Concatenated part files, with a ``run_id`` column, in run order (empty when not collected).
    timings, failures : DataFrame
        Per run: wall-clock seconds and worker; error type, message and traceback.
    manifest : dict
        Spec, versions, command, seed, times and counts.
    """

    def __init__(self, path: Path, manifest: dict[str, Any]) -> None:
        self.path = Path(path)
        self.manifest = manifest

    def _table(self, fname: str):
        import pandas as pd

        fpath = self.path / fname
        if not fpath.exists():
            return pd.DataFrame()
        return _read_table(fpath).to_pandas()

    @cached_property
    def _stored_runs(self):
        # runs.parquet as stored, read once: the runs table and the part tables' order use it
        return self._table("runs.parquet")

    @cached_property
    def runs(self):
        """Runs table joined with timings (``duration_s``, ``worker``)."""
        runs = self._stored_runs
        timings = self.timings
        if len(runs) and len(timings):
            runs = runs.merge(
                timings[["run_id", "duration_s", "worker"]], on="run_id", how="left", sort=False
            )
        return runs

    @cached_property
    def timings(self):
        """Wall-clock seconds and worker of each run."""
        return self._table("timings.parquet")

    @cached_property
    def failures(self):
        """Error type, message and traceback of each failed run."""
        return self._table("failures.parquet")

    def _parts(self, name: str):
        import pandas as pd
        import pyarrow as pa

        parts = sorted((self.path / name).glob("part-*.parquet"))
        if not parts:
            return pd.DataFrame()
        tables = [_read_table(p) for p in parts]
        frame = pa.concat_tables(tables, promote_options="default").to_pandas()
        runs = self._stored_runs
        if len(runs):
            order = runs.groupby("run_id", sort=False)["index"].min()
            key = frame["run_id"].map(order)
            frame = frame.assign(_order=key).sort_values("_order", kind="stable")
            frame = frame.drop(columns="_order").reset_index(drop=True)
        return frame

    @cached_property
    def rounds(self):
        """Round tables of all stored runs (``run_id``, ``round``, one column per metric)."""
        return self._parts("rounds")

    @cached_property
    def traders(self):
        """Sampled trader states of all stored runs."""
        return self._parts("traders")

    @cached_property
    def ledger(self):
        """Every kept trade of all stored runs."""
        return self._parts("ledger")

    @cached_property
    def meetings(self):
        """Every recorded meeting (traded or not) of all stored runs."""
        return self._parts("meetings")

    @cached_property
    def totals(self):
        """Each trader's surplus over each run, with the columns that group traders."""
        return self._parts("totals")

    def __repr__(self) -> str:
        return f"Results({str(self.path)!r}, counts={self.manifest.get('counts')})"


def load(folder) -> Results:
    """Open a results folder for reading.

    Parameters
    ----------
    folder : str or Path
        A folder written by :func:`propensim.experiments.run_experiment`.

    Raises
    ------
    StoreError
        If the folder is missing, not ours, or its manifest cannot be read.
    """
    path = Path(folder)
    if "\x00" in str(folder) or not path.is_dir():
        raise StoreError(f"{shown_path(folder)}: no such results folder")
    return Results(path, _read_manifest(path))


def query(folder, sql: str):
    """Run read-only SQL over a results folder with DuckDB and return a pandas DataFrame.

    Views: ``runs``, ``timings``, ``failures`` (one file each) and ``rounds``, ``traders``,
    ``ledger`` (all part files). Column names holding dots (design parameters such as
    ``population.sigma``) must be quoted: ``SELECT "population.sigma", avg(efficiency) ...``.

    The query only reads: every statement must be a ``SELECT``, and DuckDB can open no file
    of its own (see :mod:`propensim.experiments.readonly_query`). A write (``COPY ... TO``,
    ``CREATE``, ``EXPORT``), ``ATTACH``, ``INSTALL``, ``LOAD``, ``SET`` or a read of any other
    file raises a one-line :class:`StoreError`, and nothing is changed.

    Examples
    --------
    >>> sql = "SELECT arm, avg(efficiency) FROM runs GROUP BY arm"
    >>> query("results/demo", sql)  # doctest: +SKIP
    """
    path = Path(folder)
    _read_manifest(path) if path.is_dir() else load(path)
    from propensim.experiments.readonly_query import _views, run_readonly

    try:
        return run_readonly(path, sql)
    except StoreError as exc:
        import re

        m = re.search(r"Table with name (\w+) does not exist", str(exc))
        if m is None:
            raise
        name, tables = m.group(1), ", ".join(_views(path)) or "none stored yet"
        hint = _NOT_COLLECTED.get(name.lower())
        why = f" (not collected: set {hint} in the spec)" if hint else ""
        raise StoreError(
            f"query failed: {path} has no table {name!r}{why}; tables in this folder: {tables}"
        ) from None


#: What a spec sets to collect each optional table.
_NOT_COLLECTED = {
    "rounds": "collect.rounds = true",
    "traders": "collect.traders_every = N",
    "ledger": "collect.ledger = true",
    "totals": "collect.totals = true",
}
