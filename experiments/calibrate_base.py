"""Shared pieces of calibration: errors, the observed information, result folders.

Every calibration writes its result to a folder laid out like an experiment's results folder:
``manifest.json`` (what was fitted, from which data, with which options, package versions, timings)
and Parquet tables written whole and atomically with the helpers of
:mod:`propensim.experiments.store`. Tables hold only numbers that reproduce exactly on a rerun
(no times, no host names), so a rerun writes the same Parquet bytes.
"""

from __future__ import annotations

import datetime as _dt
import json
import platform
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

__all__ = [
    "CALIBRATION_FORMAT",
    "CalibrationError",
    "ConvergenceError",
    "observed_information",
    "write_folder",
]

#: ``format`` of a calibration folder's manifest.
CALIBRATION_FORMAT = "propensim-calibration"
#: Two-sided 95% normal quantile (Wald intervals).
Z95 = 1.959963984540054


class CalibrationError(ValueError):
    """Bad input to a calibration (one line naming the field): the command exits with 2."""


class ConvergenceError(RuntimeError):
    """A fit that did not converge (the command prints its table, says so and exits with 1)."""


def observed_information(grad: Callable[[np.ndarray], np.ndarray], theta: np.ndarray) -> np.ndarray:
    """Minus the Hessian of a log-likelihood, by central differences of its exact gradient.

    Parameters
    ----------
    grad : callable
        Gradient of the log-likelihood (not of its negative), ``theta -> ndarray (p,)``.
    theta : ndarray, shape (p,)
        Where to evaluate (the maximum-likelihood estimate).

    Returns
    -------
    ndarray, shape (p, p)
        Symmetrised observed information. Steps are ``1e-5 * max(1, |theta_i|)``: with an
        exact gradient the truncation error is ``O(h**2)`` and rounding ``O(eps / h)``, both far
        below the sampling error of the estimates.

    References
    ----------
    .. [1] Y. Pawitan, *In All Likelihood* (Oxford, 2001), section 2.5 (observed Fisher
       information and standard errors); central differences: common practice, no source.
    """
    theta = np.asarray(theta, dtype=float)
    p = theta.size
    hess = np.empty((p, p))
    for j in range(p):
        h = 1e-5 * max(1.0, abs(theta[j]))
        up, down = theta.copy(), theta.copy()
        up[j] += h
        down[j] -= h
        hess[:, j] = (grad(up) - grad(down)) / (2.0 * h)
    return -0.5 * (hess + hess.T)


def covariance(info: np.ndarray) -> tuple[np.ndarray, bool]:
    """Inverse of the observed information, and whether it was positive definite.

    Where it is not (a flat direction, a parameter at a bound) the covariance is all NaN: a
    standard error from it would mean nothing.
    """
    p = info.shape[0]
    if p == 0:
        return np.zeros((0, 0)), True
    try:
        np.linalg.cholesky(info)
    except np.linalg.LinAlgError:
        return np.full((p, p), np.nan), False
    return np.linalg.inv(info), True


def now_utc() -> str:
    """The time now, ISO 8601 in UTC."""
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")


def _parquet(rows: Sequence[dict[str, Any]], columns: dict[str, str]) -> bytes:
    import pyarrow as pa

    from propensim.experiments.store import _parquet_bytes

    types = {"str": pa.string(), "float": pa.float64(), "int": pa.int64(), "bool": pa.bool_()}
    schema = pa.schema([pa.field(name, types[kind]) for name, kind in columns.items()])
    table = pa.Table.from_pylist([{c: r.get(c) for c in columns} for r in rows], schema=schema)
    return _parquet_bytes(table)


def write_folder(
    out,
    kind: str,
    manifest: dict[str, Any],
    tables: dict[str, tuple[Sequence[dict[str, Any]], dict[str, str]]],
) -> Path:
    """Write a calibration folder: each table as ``NAME.parquet``, then ``manifest.json`` last.

    Parameters
    ----------
    out : str or Path
        The folder (created if missing). Files of an earlier calibration in it are replaced;
        a folder holding anything else that is not ours is refused.
    kind : str
        What was calibrated (``"returns"``, ``"acceptance"``, ``"tuning"``).
    manifest : dict
        Plain data recorded in ``manifest.json`` (format, kind, versions and times are added).
    tables : dict
        ``name -> (rows, {column: "str" | "float" | "int" | "bool"})``.

    Returns
    -------
    Path
        The folder.
    """
    from propensim.experiments.store import _json_safe, atomic_write_bytes, package_versions

    path = Path(out)
    if path.exists() and not path.is_dir():
        raise CalibrationError(f"--out {path}: exists and is not a folder")
    mpath = path / "manifest.json"
    if mpath.exists():
        try:
            old = json.loads(mpath.read_text())
        except (OSError, ValueError):
            old = {}
        if not isinstance(old, dict) or old.get("format") != CALIBRATION_FORMAT:
            raise CalibrationError(
                f"--out {path}: holds something other than a propensim calibration; "
                "choose a new folder"
            )
    path.mkdir(parents=True, exist_ok=True)
    for name, (rows, columns) in tables.items():
        atomic_write_bytes(path / f"{name}.parquet", _parquet(rows, columns))
    full = {
        "format": CALIBRATION_FORMAT,
        "format_version": 1,
        "kind": kind,
        **manifest,
        "tables": sorted(tables),
        "versions": package_versions(),
        "command": list(sys.argv),
        "platform": platform.platform(),
        "written": now_utc(),
    }
    text = json.dumps(_json_safe(full), indent=2, allow_nan=False) + "\n"
    atomic_write_bytes(mpath, text.encode())
    return path


def read_frame(data) -> tuple[Any, dict[str, Any]]:
    """A CSV or Parquet file (or a DataFrame) as a DataFrame, and where it came from."""
    import pandas as pd

    if isinstance(data, pd.DataFrame):
        return data, {"source": "DataFrame"}
    path = Path(data)
    if not path.is_file():
        raise CalibrationError(f"DATA {path}: no such file")
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".parquet", ".pq"):
        raise CalibrationError(
            f"DATA {path}: unknown file type {suffix or '(none)'!r}; allowed: .csv, .parquet"
        )
    try:
        frame = pd.read_csv(path) if suffix == ".csv" else pd.read_parquet(path)
    except Exception as exc:
        msg = " ".join(str(exc).split())
        raise CalibrationError(f"DATA {path}: cannot read ({type(exc).__name__}: {msg})") from None
    import hashlib

    return frame, {"source": str(path), "sha256": hashlib.sha256(path.read_bytes()).hexdigest()}


def caution(assumptions: str) -> str:
    """The closing caution of every calibration printout, naming its assumptions."""
    return (
        "Caution: these are model outputs, not investment or policy advice. They follow from "
        f"the assumptions behind them: {assumptions}."
    )
