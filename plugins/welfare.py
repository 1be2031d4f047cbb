"""Largest achievable surplus, competitive equilibrium and the Gini coefficient (array kernels).

Public names are re-exported (and documented) by :mod:`propensim.plugins.metrics`.
"""

from __future__ import annotations

import numpy as np

#: Restricted markets whose positive-surplus buyer and seller units span at most this many
#: (buyer unit, seller unit) cells are solved densely with ``linear_sum_assignment``.
DENSE_LIMIT = 1_000_000


def _units(name: str, arr: np.ndarray, units) -> np.ndarray:
    if units is None:
        return np.ones(arr.shape[0], dtype=np.int64)
    out = np.asarray(units)
    if out.shape != arr.shape:
        raise ValueError(f"{name} must have one entry per trader ({arr.shape[0]}), got {out.shape}")
    if not np.all(np.isfinite(out)) or np.any(out < 0) or np.any(out != np.round(out)):
        raise ValueError(f"{name} must be whole numbers >= 0")
    return out.astype(np.int64)


def _float_vector(name: str, x) -> np.ndarray:
    try:
        arr = np.asarray(x, dtype=float).reshape(-1)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be an array of numbers") from None
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite (no NaN or infinity)")
    return arr


def _expand_edges(bi, sj, units_b, units_s):
    """Edges between trader units: every copy of buyer i with every copy of seller j."""
    first_b = np.concatenate([[0], np.cumsum(units_b)])[:-1]  # shape: (n_b,)
    first_s = np.concatenate([[0], np.cumsum(units_s)])[:-1]  # shape: (n_s,)
    count = units_b[bi] * units_s[sj]  # shape: (n_edges,)
    edge = np.repeat(np.arange(bi.size), count)  # shape: (n_unit_edges,)
    start = np.concatenate([[0], np.cumsum(count)])[:-1]  # shape: (n_edges,)
    local = np.arange(edge.size) - start[edge]  # shape: (n_unit_edges,)
    per_s = units_s[sj[edge]]
    return first_b[bi[edge]] + local // per_s, first_s[sj[edge]] + local % per_s


def _dedupe(rows: np.ndarray, cols: np.ndarray, n_cols: int):
    key = np.sort(rows * np.int64(n_cols) + cols)
    first = np.ones(key.size, dtype=bool)
    first[1:] = key[1:] != key[:-1]
    key = key[first]
    return key // n_cols, key % n_cols


def max_surplus(values, costs, edges=None, *, units_b=None, units_s=None, method="auto") -> float:
    """Largest total surplus the traders can realise (see metrics.max_surplus)."""
    v = _float_vector("values", values)
    c = _float_vector("costs", costs)
    ub = _units("units_b", v, units_b)
    us = _units("units_s", c, units_s)
    if method not in ("auto", "dense", "sparse"):
        raise ValueError(f"method must be 'auto', 'dense' or 'sparse', got {method!r}")
    if edges is None:
        vu = np.sort(np.repeat(v, ub))[::-1]  # shape: (n_buyer_units,) descending
        cu = np.sort(np.repeat(c, us))  # shape: (n_seller_units,) ascending
        k = min(vu.size, cu.size)
        gain = vu[:k] - cu[:k]  # shape: (k,), decreasing
        return float(gain[gain > 0].sum())
    bi, sj = (np.asarray(e).reshape(-1) for e in edges)
    if bi.shape != sj.shape:
        raise ValueError("edges must be two arrays of the same length (buyer, seller)")
    bi = bi.astype(np.int64)
    sj = sj.astype(np.int64)
    if bi.size and (bi.min() < 0 or bi.max() >= v.size or sj.min() < 0 or sj.max() >= c.size):
        raise ValueError("edges must index into values (buyers) and costs (sellers)")
    positive = (v[bi] > c[sj]) & (ub[bi] > 0) & (us[sj] > 0)  # shape: (n_edges,)
    bi, sj = _dedupe(bi[positive], sj[positive], c.size)
    if bi.size == 0:
        return 0.0
    if np.any(ub[bi] > 1) or np.any(us[sj] > 1):
        rows, cols = _expand_edges(bi, sj, ub, us)
        v_unit = np.repeat(v, ub)
        c_unit = np.repeat(c, us)
    else:
        rows, cols, v_unit, c_unit = bi, sj, v, c
    # Compress to the units that have a positive edge.
    r_ids, r = _compress(rows, v_unit.size)
    c_ids, col = _compress(cols, c_unit.size)
    v_r = v_unit[r_ids]  # shape: (n_r,)
    c_c = c_unit[c_ids]  # shape: (n_c,)
    weight = v_r[r] - c_c[col]  # shape: (n_unit_edges,), > 0
    n_r, n_c = r_ids.size, c_ids.size
    dense = method == "dense" or (method == "auto" and n_r * n_c <= DENSE_LIMIT)
    if dense:
        from scipy.optimize import linear_sum_assignment

        grid = np.zeros((n_r, n_c))  # shape: (n_r, n_c), 0 where no edge
        grid[r, col] = weight
        ri, ci = linear_sum_assignment(grid, maximize=True)
        return float(grid[ri, ci].sum())
    ri, ci = _sparse_matching(r, col, weight, n_r, n_c)
    return float((v_r[ri] - c_c[ci]).sum())


def _compress(ids: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """The distinct ``ids`` ascending, and each entry's position among them (linear time)."""
    present = np.zeros(size, dtype=bool)
    present[ids] = True
    position = np.cumsum(present) - 1  # shape: (size,)
    return np.flatnonzero(present), position[ids]


def _sparse_matching(r, col, weight, n_r, n_c) -> tuple[np.ndarray, np.ndarray]:
    """Maximum-weight matching on a sparse bipartite graph via a padded full matching.

    Each row unit gets a private dummy column joined by an edge of weight ``eps`` (scipy needs
    nonzero weights; ``eps = 2**-40 max(weight)``), so a matching that covers every row always
    exists, and a maximum-weight row-full matching of the padded graph restricted to real columns
    is a maximum-weight matching of the real graph up to ``n_r * eps`` (relative error below
    ``1e-12 n_r``). Returns the matched real pairs ``(row, col)``.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import min_weight_full_bipartite_matching

    eps = float(weight.max()) * 2.0**-40
    own = np.arange(n_r)
    rows = np.concatenate([r, own])  # shape: (n_unit_edges + n_r,)
    cols = np.concatenate([col, n_c + own])
    gain = np.concatenate([weight, np.full(n_r, eps)])
    graph = coo_matrix((gain, (rows, cols)), shape=(n_r, n_c + n_r)).tocsr()
    ri, ci = min_weight_full_bipartite_matching(graph, maximize=True)
    real = ci < n_c  # shape: (n_r,)
    return ri[real], ci[real]


def competitive_equilibrium(values, costs) -> tuple[int, float, float]:
    """Clearing quantity and price interval of unit demand and supply (see metrics)."""
    v = np.sort(_float_vector("values", values))[::-1]  # shape: (n_b,) descending
    c = np.sort(_float_vector("costs", costs))  # shape: (n_s,) ascending
    k = min(v.size, c.size)
    crossed = v[:k] >= c[:k]  # shape: (k,), True then False
    q = int(np.count_nonzero(crossed))
    if q == 0:
        return 0, float("nan"), float("nan")
    next_v = v[q] if q < v.size else -np.inf
    next_c = c[q] if q < c.size else np.inf
    low = max(c[q - 1], next_v)
    high = min(v[q - 1], next_c)
    return q, float(low), float(high)


def gini(x) -> float:
    """Population Gini coefficient (see metrics.gini)."""
    arr = np.sort(_float_vector("x", x))
    n = arr.size
    total = arr.sum()
    if n == 0 or total <= 0:
        return float("nan")
    rank = np.arange(1, n + 1)
    return float(2.0 * (rank * arr).sum() / (n * total) - (n + 1.0) / n)
