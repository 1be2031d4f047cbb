"""Largest achievable surplus, competitive equilibrium and the Gini coefficient (array kernels).

Public names are re-exported (and documented) by :mod:`propensim.plugins.metrics`.
"""

from __future__ import annotations

import numpy as np

#: Restricted markets whose positive-surplus buyer and seller units span at most this many
#: (buyer unit, seller unit) cells are solved densely with ``linear_sum_assignment``.
DENSE_LIMIT = 1_000_000
#: Above this many units (complete market) or unit edges (restricted market), multi-unit traders
#: are not expanded into unit traders: the complete market is solved from counts (a weighted
#: crossing of the sorted steps), the restricted one as a transportation problem. Below it the
#: unit-by-unit computations of earlier versions run, so stored results keep their last bit.
EXPAND_LIMIT = 1_000_000


def _edge_arrays(edges) -> tuple[np.ndarray, np.ndarray]:
    """``(buyer_idx, seller_idx)`` from a tuple of two index arrays or a list of pairs.

    The container decides, never the sizes: a ``tuple`` of two 1-D sequences is
    ``(buyer_idx, seller_idx)``; a ``list`` of ``(buyer, seller)`` pairs or a 2-D array of shape
    ``(m, 2)`` lists one edge per row. Anything else is refused with a message saying so.
    """
    form = (
        "allowed: a tuple (buyer_idx, seller_idx) of two index arrays, a list of "
        "(buyer, seller) pairs, or an array of shape (m, 2)"
    )
    if isinstance(edges, tuple):
        if len(edges) != 2:
            raise ValueError(f"edges is a tuple of {len(edges)} items; {form}")
        try:
            bi, sj = (np.asarray(e) for e in edges)
        except (TypeError, ValueError):
            raise ValueError(f"edges must hold whole-number indices; {form}") from None
        if bi.ndim != 1 or sj.ndim != 1:
            raise ValueError(f"edges as a tuple must hold two 1-D index arrays; {form}")
        if bi.shape != sj.shape:
            raise ValueError(
                f"edges must be two arrays of the same length (buyer, seller), got "
                f"{bi.size} and {sj.size}"
            )
    else:
        try:
            arr = np.asarray(edges)
        except (TypeError, ValueError):
            raise ValueError(f"edges must be pairs of whole-number indices; {form}") from None
        if isinstance(edges, list) and arr.size == 0:
            arr = arr.reshape(0, 2)
        if not isinstance(edges, list | np.ndarray) or arr.ndim != 2 or arr.shape[1] != 2:
            raise ValueError(f"edges of type {type(edges).__name__} with shape {arr.shape}; {form}")
        bi, sj = arr[:, 0], arr[:, 1]
    for name, a in (("buyer", bi), ("seller", sj)):
        if a.size and (a.dtype.kind not in "iu" and not np.all(np.mod(a, 1) == 0)):
            raise ValueError(f"edges must hold whole-number {name} indices; {form}")
    return bi.astype(np.int64), sj.astype(np.int64)


def _edges_within(edges, n_b: int, n_s: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_edge_arrays`, checked to index into ``n_b`` buyers and ``n_s`` sellers."""
    bi, sj = _edge_arrays(edges)
    if bi.size and (bi.min() < 0 or bi.max() >= n_b or sj.min() < 0 or sj.max() >= n_s):
        raise ValueError("edges must index into values (buyers) and costs (sellers)")
    return bi, sj


def _steps(x: np.ndarray, units: np.ndarray, descending: bool):
    """Sorted distinct-trader steps: values and the cumulative units at the end of each step."""
    order = np.argsort(-x if descending else x, kind="stable")
    xs = x[order]  # shape: (n,)
    ends = np.cumsum(units[order])  # shape: (n,) units up to and including each trader
    return xs, ends


def _at(xs: np.ndarray, ends: np.ndarray, i: int) -> float:
    """The value of unit ``i`` (0-based) of a sorted step function."""
    return float(xs[np.searchsorted(ends, i, side="right")])


def _crossing_surplus(v, ub, c, us) -> float:
    """Complete-market maximum surplus from counts: the sorting rule on weighted steps.

    Values descending and costs ascending are step functions of the unit index; between two
    consecutive step ends both are constant, so the surplus is ``sum (v - c)^+ x length`` over
    the segments. Memory and time grow with traders, not with units.
    """
    vs, ve = _steps(v, ub, descending=True)
    cs, ce = _steps(c, us, descending=False)
    k = int(min(ve[-1] if ve.size else 0, ce[-1] if ce.size else 0))
    if k == 0:
        return 0.0
    cuts = np.unique(np.concatenate([[0], ve[ve < k], ce[ce < k], [k]]))  # shape: (n_seg + 1,)
    start = cuts[:-1]  # shape: (n_seg,) first unit of each segment
    gain = vs[np.searchsorted(ve, start, side="right")] - cs[np.searchsorted(ce, start, "right")]
    length = np.diff(cuts).astype(float)  # shape: (n_seg,)
    return float((np.maximum(gain, 0.0) * length).sum())


def _transport_surplus(v, ub, c, us, bi, sj) -> float:
    """Restricted-market maximum surplus with unit capacities, as a transportation problem.

    Maximise ``sum_e (v_i - c_j) x_e`` subject to ``sum_{e at i} x_e <= u_i`` for every trader
    and ``x >= 0``. The constraint matrix is the incidence matrix of a bipartite graph, which is
    totally unimodular, so the simplex optimum is integral: it equals the maximum-weight matching
    of the unit-expanded graph without building it (memory linear in edges). Solved with HiGHS
    (``scipy.optimize.linprog``).

    References
    ----------
    A. Schrijver, *Combinatorial Optimization*, Springer (2003), ch. 21 (bipartite b-matching;
    total unimodularity of bipartite incidence matrices).
    """
    from scipy.optimize import linprog
    from scipy.sparse import coo_matrix

    weight = v[bi] - c[sj]  # shape: (n_edges,), > 0 after the caller's filter
    m = bi.size
    rows = np.concatenate([bi, v.size + sj])  # shape: (2 m,)
    cols = np.concatenate([np.arange(m), np.arange(m)])
    a_ub = coo_matrix((np.ones(2 * m), (rows, cols)), shape=(v.size + c.size, m)).tocsr()
    b_ub = np.concatenate([ub, us]).astype(float)
    res = linprog(-weight, A_ub=a_ub, b_ub=b_ub, bounds=(0, None), method="highs")
    if res.status != 0:  # pragma: no cover - a bounded feasible LP; reported, not guessed
        raise ValueError(f"max_surplus: the transportation problem was not solved ({res.message})")
    return float(-res.fun)


def crossing(values, units_b, costs, units_s) -> tuple[int, float, float]:
    """Competitive quantity and clearing price interval of multi-unit traders, from counts.

    The same numbers as :func:`competitive_equilibrium` on the unit-expanded arrays
    (``np.repeat(values, units_b)``, ``np.repeat(costs, units_s)``), without expanding: the
    quantity is found by bisection over the unit index, where the demand step is still at or
    above the supply step (a prefix, since one falls and the other rises).
    """
    v = _float_vector("values", values)
    c = _float_vector("costs", costs)
    ub = _units("units_b", v, units_b)
    us = _units("units_s", c, units_s)
    vs, ve = _steps(v, ub, descending=True)
    cs, ce = _steps(c, us, descending=False)
    total_b = int(ve[-1]) if ve.size else 0
    total_s = int(ce[-1]) if ce.size else 0
    lo_q, hi_q = 0, min(total_b, total_s)  # q* in [lo_q, hi_q]
    while lo_q < hi_q:
        mid = (lo_q + hi_q + 1) // 2  # is unit mid - 1 crossed?
        if _at(vs, ve, mid - 1) >= _at(cs, ce, mid - 1):
            lo_q = mid
        else:
            hi_q = mid - 1
    q = lo_q
    if q == 0:
        return 0, float("nan"), float("nan")
    next_v = _at(vs, ve, q) if q < total_b else -np.inf
    next_c = _at(cs, ce, q) if q < total_s else np.inf
    low = max(_at(cs, ce, q - 1), next_v)
    high = min(_at(vs, ve, q - 1), next_c)
    return q, float(low), float(high)


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
    if method not in ("auto", "dense", "sparse", "lp"):
        raise ValueError(f"method must be 'auto', 'dense', 'sparse' or 'lp', got {method!r}")
    if edges is None:
        if int(ub.sum()) + int(us.sum()) > EXPAND_LIMIT:
            return _crossing_surplus(v, ub, c, us)
        # Small markets keep the unit-by-unit sum, so stored results stay bit for bit the same.
        vu = np.sort(np.repeat(v, ub))[::-1]  # shape: (n_buyer_units,) descending
        cu = np.sort(np.repeat(c, us))  # shape: (n_seller_units,) ascending
        k = min(vu.size, cu.size)
        gain = vu[:k] - cu[:k]  # shape: (k,), decreasing
        return float(gain[gain > 0].sum())
    bi, sj = _edges_within(edges, v.size, c.size)
    positive = (v[bi] > c[sj]) & (ub[bi] > 0) & (us[sj] > 0)  # shape: (n_edges,)
    bi, sj = _dedupe(bi[positive], sj[positive], c.size)
    if bi.size == 0:
        return 0.0
    if method == "lp" or (method == "auto" and int((ub[bi] * us[sj]).sum()) > EXPAND_LIMIT):
        return _transport_surplus(v, ub, c, us, bi, sj)
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


def max_surplus_open_buyers(values, costs, edges=None, *, units_s=None) -> float:
    """Largest total surplus when buyers may buy any number of units (see metrics.max_surplus).

    With no limit on the buyers' side the assignment falls apart seller by seller: each seller
    unit goes to its best-valued partner, so the maximum is ``sum_j u_j max(0, max_i v_i - c_j)``
    over each seller's partners ``i``.
    """
    v = _float_vector("values", values)
    c = _float_vector("costs", costs)
    us = _units("units_s", c, units_s)
    best = np.full(c.size, -np.inf)  # shape: (n_s,) the best value among each seller's partners
    if edges is None:
        if v.size:
            best[:] = v.max()
    else:
        bi, sj = _edges_within(edges, v.size, c.size)
        np.maximum.at(best, sj, v[bi])
    gain = np.maximum(best - c, 0.0)  # shape: (n_s,) no partner (-inf): no gain
    return float((us * gain).sum())


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
