"""Figures of experiments, drawn with matplotlib without a display (no pyplot, no global state).

Every function takes plain data (DataFrames or arrays, usually straight from a results folder or
from :mod:`propensim.experiments.tables`) and returns a :class:`matplotlib.figure.Figure`;
:func:`save` writes it as PNG and SVG, :func:`svg_bytes` gives SVG text that is the same bytes on
every call (fixed hash salt, no date). Axes carry their units. The house style (:data:`STYLE`)
is applied to every figure drawn here.

Figures
-------
:func:`pair_figure`         one buyer and one seller: curves, joint curve, forces; beside the
                            classical supply-and-demand picture of the same population
:func:`paths_figure`        metrics round by round: mean and 95% interval over replicates
:func:`sweep_figure`        a metric against one design parameter, per arm, with intervals
:func:`heatmap_figure`      a metric over two design parameters
:func:`forest_figure`       paired differences with intervals, one row per arm (or point)
:func:`network_figure`      traders coloured by role and sized by surplus (sampled if large)
:func:`gains_losses_figure` change in surplus per group of traders, with intervals
:func:`event_sales_figure`  sales and stock over time (event mode)
:func:`calibration_figure`  observed distribution against fitted model densities
:func:`sensitivity_figure`  Sobol' indices or Morris screening measures per parameter

References
----------
Interval of a mean over replicates: Student's t (Law 2015, *Simulation Modeling and Analysis*,
5th ed., sec. 9.4). Forest plots: Lewis, S. and Clarke, M. (2001), BMJ 322, 1479-1480.
"""

from __future__ import annotations

import contextlib
import io
import warnings
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from cycler import cycler  # installed with matplotlib

__all__ = [
    "METRIC_LABELS",
    "STYLE",
    "calibration_figure",
    "event_sales_figure",
    "forest_figure",
    "gains_losses_figure",
    "heatmap_figure",
    "metric_label",
    "network_figure",
    "pair_figure",
    "paths_figure",
    "save",
    "sensitivity_figure",
    "svg_bytes",
    "sweep_figure",
]

#: The house style: muted ink, light grid, no top/right spines, text kept as text in SVG.
STYLE = {
    "font.family": "sans-serif",
    "font.size": 9.0,
    "axes.titlesize": 10.0,
    "axes.titleweight": "bold",
    "axes.labelsize": 9.0,
    "axes.edgecolor": "#444444",
    "axes.linewidth": 0.8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#dddddd",
    "grid.linewidth": 0.6,
    "axes.prop_cycle": cycler(
        color=["#1b6f8a", "#d1603d", "#5a8f3a", "#8a5aa8", "#b08d1a", "#555555"]
    ),
    "legend.frameon": False,
    "legend.fontsize": 8.0,
    "xtick.labelsize": 8.0,
    "ytick.labelsize": 8.0,
    "figure.dpi": 100,
    "savefig.dpi": 150,
    "svg.fonttype": "none",  # text stays text: smaller files, selectable in a browser
    "path.simplify": True,
}
#: Colours of the two trader roles.
BUYER_COLOUR, SELLER_COLOUR, JOINT_COLOUR = "#1b6f8a", "#d1603d", "#8a5aa8"

#: Axis labels, with units, of the built-in metrics (the unit of a run's summary number).
METRIC_LABELS = {
    "volume": "volume (units traded per run)",
    "mean_price": "mean trade price (price units)",
    "vwap": "volume-weighted price (price units)",
    "price_sd": "price dispersion, sd (price units)",
    "preference_gap": "preference gap (price units)",
    "efficiency": "efficiency (share of max. surplus)",
    "buyer_surplus": "buyer surplus (price units x units)",
    "seller_surplus": "seller surplus (price units x units)",
    "surplus_gini": "Gini of trader surplus (0 to 1)",
    "smith_alpha": "Smith's alpha (% of competitive price)",
    "energy": "entropic energy (gamma units)",
}
#: The same for one round (round tables hold per-round values).
ROUND_LABELS = {**METRIC_LABELS, "volume": "volume (units traded per round)"}
ROUND_LABELS["buyer_surplus"] = "buyer surplus per round (price units x units)"
ROUND_LABELS["seller_surplus"] = "seller surplus per round (price units x units)"


def metric_label(metric: str, *, per_round: bool = False) -> str:
    """Axis label with units of a metric (its name, for metrics without a known unit)."""
    table = ROUND_LABELS if per_round else METRIC_LABELS
    return table.get(metric, f"{metric} (model units)")


@contextlib.contextmanager
def _style():
    import matplotlib

    with matplotlib.rc_context(STYLE):
        yield


def _styled(func):
    """Draw the whole figure inside the house style (colours resolve when artists are made)."""
    import functools

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with _style():
            return func(*args, **kwargs)

    return wrapper


def _figure(width: float, height: float):
    from matplotlib.figure import Figure

    with _style():
        fig = Figure(figsize=(width, height), layout="constrained")
    fig._propensim_style = dict(STYLE)
    return fig


def _subplots(fig, nrows=1, ncols=1, **kw):
    with _style():
        axes = fig.subplots(nrows, ncols, squeeze=False, **kw)
    return axes


def svg_bytes(fig, salt: str = "propensim") -> bytes:
    """The figure as SVG bytes, identical on every call for the same figure and ``salt``.

    Matplotlib's SVG ids are hashes salted by the ``svg.hashsalt`` setting (random otherwise),
    and its metadata holds a date unless ``Date`` is None.
    """
    import matplotlib

    buf = io.BytesIO()
    with matplotlib.rc_context({**STYLE, "svg.hashsalt": salt}):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": "propensim"})
    return buf.getvalue()


def png_bytes(fig) -> bytes:
    """The figure as PNG bytes (no timestamp or software metadata)."""
    import matplotlib

    buf = io.BytesIO()
    with matplotlib.rc_context(STYLE):
        fig.savefig(buf, format="png", metadata={"Software": None})
    return buf.getvalue()


def save(fig, path, formats: Sequence[str] = ("png", "svg")) -> list[Path]:
    """Write ``fig`` as ``path.png`` and ``path.svg`` (``path`` without suffix); returns paths."""
    from propensim.experiments.store import atomic_write_bytes

    path = Path(path)
    out = []
    for fmt in formats:
        target = path.with_suffix(f".{fmt}")
        data = svg_bytes(fig, salt=path.stem) if fmt == "svg" else png_bytes(fig)
        atomic_write_bytes(target, data)
        out.append(target)
    return out


def _t_band(values: np.ndarray, confidence: float = 0.95):
    """Mean and Student-t interval of the mean over axis 0 (NaN-aware)."""
    from scipy import stats

    with np.errstate(invalid="ignore", divide="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a round with one replicate: no sd
        n = np.sum(np.isfinite(values), axis=0)  # shape: (rounds,)
        mean = np.nanmean(values, axis=0) if values.size else np.array([])
        sd = np.nanstd(values, axis=0, ddof=1) if values.shape[0] > 1 else np.zeros_like(mean)
        half = stats.t.ppf(0.5 + confidence / 2, np.maximum(n - 1, 1)) * sd / np.sqrt(n)
    half = np.where(n > 1, half, 0.0)
    return mean, mean - half, mean + half


# -- one pair -----------------------------------------------------------------------------------
@_styled
def pair_figure(
    buyer_mu: float,
    buyer_sigma: float,
    seller_mu: float,
    seller_sigma: float,
    *,
    gamma: float = 1.0,
    values=None,
    costs=None,
):
    """One buyer and one seller, beside the classical supply-and-demand picture.

    Left: the buyer's and the seller's propensity curves (normal), their joint curve
    ``J = P_b P_s`` shaded, and the entropic forces ``F = gamma d ln P / dx`` each trader feels
    at the joint price (arrows; MODEL.md sections 2-3). Right: demand (values, highest first) and
    supply (costs, lowest first) of a population as step curves and the competitive price where
    they cross; without ``values``/``costs``, the pair's own reservation prices.

    Parameters
    ----------
    buyer_mu, buyer_sigma, seller_mu, seller_sigma : float
        Preferred prices and widths (price units).
    gamma : float
        Energy scale of both traders.
    values, costs : array-like, optional
        Buyers' values and sellers' costs for the right panel (price units).
    """
    from propensim.agents.curves import NormalCurve
    from propensim.agents.joint_curve import joint

    b = NormalCurve(mu=buyer_mu, sigma=buyer_sigma)
    s = NormalCurve(mu=seller_mu, sigma=seller_sigma)
    j = joint(b, s)
    lo = min(buyer_mu - 3.5 * buyer_sigma, seller_mu - 3.5 * seller_sigma)
    hi = max(buyer_mu + 3.5 * buyer_sigma, seller_mu + 3.5 * seller_sigma)
    x = np.linspace(lo, hi, 241)  # shape: (241,)
    pb, ps = np.asarray(b.value(x), float), np.asarray(s.value(x), float)
    jx = pb * ps  # shape: (241,) joint curve
    fig = _figure(8.0, 3.2)
    ax, ax2 = _subplots(fig, 1, 2, width_ratios=[1.35, 1])[0]
    ax.plot(
        x, pb, color=BUYER_COLOUR, label=f"buyer P_b (mu={buyer_mu:.1f}, sigma={buyer_sigma:.3g})"
    )
    ax.plot(
        x,
        ps,
        color=SELLER_COLOUR,
        label=f"seller P_s (mu={seller_mu:.1f}, sigma={seller_sigma:.3g})",
    )
    ax.fill_between(x, 0, jx, color=JOINT_COLOUR, alpha=0.35, lw=0, label="joint J = P_b P_s")
    xm = float(j.mean)
    fb, fs = float(b.force(xm, gamma)), float(s.force(xm, gamma))
    scale = 0.25 * (hi - lo) / max(abs(fb), abs(fs), 1e-12)
    y0 = float(np.max(jx)) + 0.08
    for f, colour, dy in ((fb, BUYER_COLOUR, 0.0), (fs, SELLER_COLOUR, 0.08)):
        ax.annotate(
            "",
            xy=(xm + f * scale, y0 + dy),
            xytext=(xm, y0 + dy),
            arrowprops={"arrowstyle": "->", "color": colour, "lw": 1.4},
        )
    ax.text(
        xm,
        y0 + 0.16,
        f"forces at x*={xm:.1f}: buyer {fb:+.3f}, seller {fs:+.3f}",
        ha="center",
        fontsize=7.5,
    )
    ax.axvline(xm, color=JOINT_COLOUR, lw=0.8, ls=":")
    ax.set_ylim(0, 1.3)
    ax.set_xlabel("price (price units)")
    ax.set_ylabel("acceptance probability")
    ax.set_title(f"One pair: trade probability peak J = {float(j.peak):.3f}")
    ax.legend(loc="upper left", fontsize=7)
    if values is None or costs is None:
        values = [float(b.reservation_price(0.5, side="buyer"))]
        costs = [float(s.reservation_price(0.5, side="seller"))]
        title = "The same pair, classically (reservation prices)"
    else:
        title = "Supply and demand of the population"
    v = np.sort(np.asarray(values, float))[::-1]  # shape: (n_buyers,) demand, highest first
    c = np.sort(np.asarray(costs, float))  # shape: (n_sellers,) supply, lowest first
    q_d, q_s = np.arange(0, v.size + 1), np.arange(0, c.size + 1)
    ax2.step(q_d, np.r_[v[:1], v], where="pre", color=BUYER_COLOUR, label="demand (values)")
    ax2.step(q_s, np.r_[c[:1], c], where="pre", color=SELLER_COLOUR, label="supply (costs)")
    k = int(np.sum(v[: min(v.size, c.size)] >= c[: min(v.size, c.size)]))
    if k > 0:
        price_lo = max(c[k - 1], v[k] if k < v.size else -np.inf)
        price_hi = min(v[k - 1], c[k] if k < c.size else np.inf)
        p_star = 0.5 * (price_lo + price_hi)
        ax2.axhline(p_star, color="#777777", lw=0.8, ls="--")
        ax2.plot(
            [k], [p_star], "o", color="#333333", ms=4, label=f"competitive: q={k}, p={p_star:.1f}"
        )
    ax2.set_xlabel("quantity (units)")
    ax2.set_ylabel("price (price units)")
    ax2.set_title(title)
    ax2.legend(loc="best", fontsize=7)
    return fig


# -- paths --------------------------------------------------------------------------------------
@_styled
def paths_figure(rounds, runs, metrics: Sequence[str] = ("vwap", "volume"), *, max_points=4):
    """Metrics round by round: the mean over replicates and a 95% interval of that mean, per arm.

    Parameters
    ----------
    rounds : pandas.DataFrame
        Round tables (``run_id``, ``round`` and metric columns), e.g. ``load(folder).rounds``.
    runs : pandas.DataFrame
        The runs table (``run_id``, ``arm``, ``point``), to group rounds by arm and point.
    metrics : sequence of str
        One row of panels per metric (those missing from ``rounds`` are skipped).
    max_points : int
        Draw at most this many design points (one column of panels each, the first ones).
    """
    metrics = [m for m in metrics if m in rounds.columns]
    if not metrics:
        raise ValueError("rounds holds none of the asked-for metrics")
    keyed = rounds.merge(runs[["run_id", "arm", "point"]].drop_duplicates("run_id"), on="run_id")
    points = sorted(keyed["point"].unique())[:max_points]
    arms = list(dict.fromkeys(runs["arm"]))
    fig = _figure(2.6 * len(points) + 1.0, 2.2 * len(metrics) + 0.4)
    axes = _subplots(fig, len(metrics), len(points), sharex=True)
    for c, p in enumerate(points):
        at = keyed[keyed["point"] == p]
        for r, metric in enumerate(metrics):
            ax = axes[r][c]
            for i, arm in enumerate(arms):
                cell = at[at["arm"] == arm]
                if not len(cell):
                    continue
                wide = cell.pivot_table(index="run_id", columns="round", values=metric)
                mean, lo, hi = _t_band(wide.to_numpy(dtype=float))
                colour = f"C{i}"
                x = wide.columns.to_numpy()
                ax.plot(x, mean, color=colour, lw=1.2, label=f"{arm or 'runs'} (n={len(wide)})")
                ax.fill_between(x, lo, hi, color=colour, alpha=0.2, lw=0)
            if r == 0:
                ax.set_title(f"point {p}", fontsize=9)
            if c == 0:
                ax.set_ylabel(metric_label(metric, per_round=True), fontsize=8)
            if r == len(metrics) - 1:
                ax.set_xlabel("round")
    axes[0][0].legend(loc="best", fontsize=7)
    fig.suptitle("Round paths: mean over replicates, shaded 95% interval of the mean", fontsize=10)
    return fig


# -- sweeps -------------------------------------------------------------------------------------
@_styled
def sweep_figure(points, parameter: str, metrics: Sequence[str], *, log_x: bool = False):
    """Metrics against one design parameter, per arm, with the table's intervals.

    Parameters
    ----------
    points : pandas.DataFrame
        :func:`propensim.experiments.tables.point_table` output.
    parameter : str
        The parameter column for the x axis.
    metrics : sequence of str
        One panel per metric.
    """
    metrics = [m for m in metrics if m in set(points["metric"])]
    n = len(metrics)
    ncols = min(3, n)
    nrows = -(-n // ncols)
    fig = _figure(3.0 * ncols + 0.4, 2.5 * nrows + 0.3)
    axes = _subplots(fig, nrows, ncols)
    arms = list(dict.fromkeys(points["arm"]))
    for k, metric in enumerate(metrics):
        ax = axes[k // ncols][k % ncols]
        sub = points[points["metric"] == metric]
        for i, arm in enumerate(arms):
            cell = sub[sub["arm"] == arm].sort_values(parameter)
            x = cell[parameter].to_numpy(dtype=float)
            y = cell["mean"].to_numpy(dtype=float)
            err = np.vstack(
                [y - cell["ci_low"].to_numpy(float), cell["ci_high"].to_numpy(float) - y]
            )
            ax.errorbar(
                x,
                y,
                yerr=np.abs(err),
                color=f"C{i}",
                marker="o",
                ms=3.5,
                lw=1.0,
                capsize=2,
                label=arm or "runs",
                ls="-" if len(x) < 12 else "none",
            )
        ax.set_xlabel(parameter)
        ax.set_ylabel(metric_label(metric), fontsize=8)
        if log_x:
            ax.set_xscale("log")
    for k in range(n, nrows * ncols):
        axes[k // ncols][k % ncols].set_visible(False)
    axes[0][0].legend(loc="best", fontsize=7)
    level = float(points["confidence"].iloc[0]) if len(points) else 0.95
    fig.suptitle(
        f"Sweep over {parameter}: mean per point, {level:.0%} bootstrap interval", fontsize=10
    )
    return fig


@_styled
def heatmap_figure(points, x: str, y: str, metric: str, arm: str | None = None):
    """Mean of a metric over two grid parameters (one arm), each cell labelled with its value."""
    sub = points[points["metric"] == metric]
    if arm is not None:
        sub = sub[sub["arm"] == arm]
    grid = sub.pivot_table(index=y, columns=x, values="mean", aggfunc="mean")
    fig = _figure(4.6, 3.6)
    ax = _subplots(fig)[0][0]
    ax.grid(False)
    data = grid.to_numpy(dtype=float)
    im = ax.imshow(data, origin="lower", aspect="auto", cmap="viridis")
    ax.set_xticks(
        range(grid.shape[1]), [f"{v:g}" if isinstance(v, float) else str(v) for v in grid.columns]
    )
    ax.set_yticks(
        range(grid.shape[0]), [f"{v:g}" if isinstance(v, float) else str(v) for v in grid.index]
    )
    for (i, j), v in np.ndenumerate(data):
        if np.isfinite(v):
            ax.text(j, i, f"{v:.3g}", ha="center", va="center", fontsize=7, color="white")
    ax.set_xlabel(x)
    ax.set_ylabel(y)
    fig.colorbar(im, ax=ax, label=metric_label(metric))
    ax.set_title(f"{metric}" + (f", arm {arm}" if arm else ""))
    return fig


# -- comparisons --------------------------------------------------------------------------------
@_styled
def forest_figure(comparison, *, by_point: bool = False):
    """Paired differences ``arm - baseline`` with intervals: one panel per metric.

    Parameters
    ----------
    comparison : pandas.DataFrame
        :func:`propensim.experiments.compare.compare_arms` output (``by_point`` tables too: with
        ``by_point=True`` every point gets a row, else only the all-points rows are drawn).
    """
    table = comparison
    if "point" in table.columns and not by_point:
        table = table[table["point"].isna()]
    metrics = list(dict.fromkeys(table["metric"]))
    fig = _figure(
        7.0, 0.5 + sum(0.35 * max(1, (table["metric"] == m).sum()) + 0.55 for m in metrics)
    )
    axes = _subplots(
        fig, len(metrics), 1, height_ratios=[max(1, (table["metric"] == m).sum()) for m in metrics]
    )
    level = float(table["confidence"].iloc[0]) if len(table) else 0.95
    for k, metric in enumerate(metrics):
        ax = axes[k][0]
        sub = table[table["metric"] == metric].reset_index(drop=True)
        labels = []
        for i, r in sub.iterrows():
            label = f"{r['arm']} - {r['baseline']}"
            if "point" in sub.columns and not (r["point"] is None or r["point"] != r["point"]):
                with contextlib.suppress(TypeError, ValueError):
                    label += f", point {int(r['point'])}"
            labels.append(label)
            excludes = r["ci_low"] > 0 or r["ci_high"] < 0
            colour = "C0" if excludes else "#888888"
            ax.plot([r["ci_low"], r["ci_high"]], [i, i], color=colour, lw=1.6)
            ax.plot([r["mean_diff"]], [i], "s", color=colour, ms=4.5)
        ax.axvline(0, color="#333333", lw=0.8)
        ax.set_yticks(range(len(labels)), labels)
        ax.set_ylim(len(labels) - 0.5, -0.5)
        ax.set_xlabel(f"difference in {metric_label(metric)}", fontsize=8)
        ax.grid(axis="y", visible=False)
    fig.suptitle(
        f"Paired differences (arm - baseline), {level:.0%} bootstrap interval; "
        "grey: the interval includes 0",
        fontsize=9,
    )
    return fig


# -- the network --------------------------------------------------------------------------------
@_styled
def network_figure(buyer, seller, role, surplus=None, *, max_nodes: int = 300, seed: int = 0):
    """Traders as nodes, coloured by role and sized by surplus; edges are buyer-seller links.

    Parameters
    ----------
    buyer, seller : array-like of int, shape (n_edges,)
        Rows of each trading edge.
    role : array-like of int, shape (n,)
        0 buyer, 1 seller.
    surplus : array-like of float, shape (n,), optional
        Each trader's surplus over the run (price units x units); node area grows with it.
    max_nodes : int
        Above this many traders a uniform sample of them is drawn (with the edges among them).
    seed : int
        Seed of the sample and of the layout.
    """
    import networkx as nx

    role = np.asarray(role)
    n = role.size
    surplus = np.zeros(n) if surplus is None else np.asarray(surplus, dtype=float)
    keep = np.arange(n)
    rng = np.random.default_rng(seed)
    sampled = n > max_nodes
    if sampled:
        keep = np.sort(rng.choice(n, size=max_nodes, replace=False))
    mask = np.zeros(n, dtype=bool)
    mask[keep] = True
    buyer, seller = np.asarray(buyer), np.asarray(seller)
    kept_edge = mask[buyer] & mask[seller]  # shape: (n_edges,)
    g = nx.Graph()
    g.add_nodes_from(keep.tolist())
    g.add_edges_from(zip(buyer[kept_edge].tolist(), seller[kept_edge].tolist(), strict=True))
    pos = nx.spring_layout(g, seed=seed, k=1.5 / np.sqrt(max(len(keep), 1)))
    xy = np.array([pos[i] for i in keep])  # shape: (kept, 2)
    fig = _figure(5.4, 4.6)
    ax = _subplots(fig)[0][0]
    ax.grid(False)
    ax.set_axis_off()
    if kept_edge.any():
        from matplotlib.collections import LineCollection

        segs = [
            (pos[int(a)], pos[int(b)])
            for a, b in zip(buyer[kept_edge], seller[kept_edge], strict=True)
        ]
        ax.add_collection(LineCollection(segs, colors="#bbbbbb", linewidths=0.4, zorder=1))
    s = surplus[keep]
    top = np.nanmax(np.abs(s)) if s.size and np.isfinite(s).any() else 0.0
    sizes = 8 + 120 * (np.clip(s, 0, None) / top if top > 0 else np.zeros_like(s))
    colours = np.where(role[keep] == 0, BUYER_COLOUR, SELLER_COLOUR)
    ax.scatter(xy[:, 0], xy[:, 1], s=sizes, c=colours, edgecolors="white", linewidths=0.4, zorder=2)
    for colour, label in ((BUYER_COLOUR, "buyer"), (SELLER_COLOUR, "seller")):
        ax.scatter([], [], s=30, c=colour, label=label)
    ax.legend(
        loc="upper left",
        bbox_to_anchor=(1.0, 1.0),
        fontsize=7,
        title=f"area ~ surplus\n(max {top:.3g})",
        title_fontsize=7,
    )
    ax.set_title(
        f"Trading network: {len(keep)} of {n} traders" + (" (uniform sample)" if sampled else "")
    )
    return fig


# -- tables from other parts of propensim ---------------------------------------------------------
@_styled
def gains_losses_figure(groups):
    """Who gains and who loses: change of surplus per group of traders, with intervals.

    Parameters
    ----------
    groups : pandas.DataFrame
        Columns ``group`` (e.g. "buyers", "sellers", "treasury"), ``mean_diff`` (change in
        surplus, price units x units), optional ``ci_low``/``ci_high`` and ``arm`` (one panel row
        per arm).
    """
    arms = list(dict.fromkeys(groups["arm"])) if "arm" in groups.columns else [None]
    fig = _figure(6.0, 0.6 + 0.32 * len(groups) + 0.4 * len(arms))
    ax = _subplots(fig)[0][0]
    labels, y = [], 0
    for arm in arms:
        sub = groups if arm is None else groups[groups["arm"] == arm]
        for r in sub.to_dict("records"):
            d = float(r["mean_diff"])
            ax.barh(y, d, color="#5a8f3a" if d >= 0 else "#c0392b", height=0.6)
            if "ci_low" in r and "ci_high" in r:
                ax.plot([r["ci_low"], r["ci_high"]], [y, y], color="#222222", lw=1.0)
            labels.append(str(r["group"]) + (f" ({arm})" if arm is not None else ""))
            y += 1
    ax.axvline(0, color="#333333", lw=0.8)
    ax.set_yticks(range(len(labels)), labels)
    ax.set_ylim(len(labels) - 0.5, -0.5)
    from matplotlib.ticker import MaxNLocator

    ax.xaxis.set_major_locator(MaxNLocator(5))
    ax.set_xlabel("change in surplus vs baseline (price units x units)")
    ax.set_title("Who gains and who loses")
    return fig


@_styled
def event_sales_figure(
    events,
    *,
    time: str = "time",
    sales: str = "sales",
    stock: str = "stock",
    time_label: str | None = None,
):
    """Sales per time window and stock over time (event mode), mean over runs when several.

    Parameters
    ----------
    events : pandas.DataFrame
        Columns ``time`` (e.g. weeks), ``sales`` (units per window), optional ``stock`` (units)
        and ``run_id`` (several runs are averaged, with a 95% interval of the mean); other
        column names through ``time``, ``sales`` and ``stock``.
    time_label : str, optional
        The x axis label (default ``"<time> (time units)"``).
    """
    fig = _figure(6.4, 3.4)
    ax = _subplots(fig)[0][0]
    cols = [c for c in (sales, stock) if c in events.columns]
    for i, col in enumerate(cols):
        if "run_id" in events.columns:
            wide = events.pivot_table(index="run_id", columns=time, values=col)
            mean, lo, hi = _t_band(wide.to_numpy(dtype=float))
            x = wide.columns.to_numpy(dtype=float)
            ax.fill_between(x, lo, hi, color=f"C{i}", alpha=0.2, lw=0)
        else:
            x, mean = events[time].to_numpy(float), events[col].to_numpy(float)
        ax.plot(x, mean, color=f"C{i}", lw=1.2, label=f"{col} (units)")
    ax.set_xlabel(time_label or f"{time} (time units)")
    ax.set_ylabel("units")
    ax.legend(loc="best")
    ax.set_title("Sales and stock over time")
    return fig


@_styled
def calibration_figure(
    fits, *, x: str = "x", observed: str = "observed", sample=None, x_label: str | None = None
):
    """An observed distribution against fitted model densities.

    Parameters
    ----------
    fits : pandas.DataFrame
        Column ``x`` (e.g. return, in its units), optionally ``observed`` (empirical density at
        ``x``), and one column per fitted model (its density at ``x``).
    sample : array-like, optional
        The observations themselves: drawn as a density histogram (instead of ``observed``).
    x_label : str, optional
        The x axis label (default ``"<x> (data units)"``).
    """
    fig = _figure(6.4, 3.6)
    ax = _subplots(fig)[0][0]
    xs = fits[x].to_numpy(dtype=float)
    if sample is not None:
        data = np.asarray(sample, dtype=float)
        data = data[np.isfinite(data)]
        bins = int(np.clip(np.sqrt(data.size), 10, 60))
        ax.hist(data, bins=bins, density=True, color="#cccccc", label=f"observed (n={data.size})")
    elif observed in fits.columns:
        width = float(np.median(np.diff(xs))) if xs.size > 1 else 1.0
        ax.bar(xs, fits[observed].to_numpy(float), width=width, color="#cccccc", label="observed")
    for i, col in enumerate(c for c in fits.columns if c not in (x, observed)):
        ax.plot(xs, fits[col].to_numpy(float), color=f"C{i}", lw=1.3, label=col)
    ax.set_xlabel(x_label or f"{x} (data units)")
    ax.set_ylabel("density (1 / data units)")
    ax.legend(loc="best")
    ax.set_title("Calibration: observed against fitted densities")
    return fig


@_styled
def sensitivity_figure(indices):
    """Sensitivity indices per parameter, one panel per metric (and arm).

    Parameters
    ----------
    indices : pandas.DataFrame
        :func:`propensim.experiments.sensitivity.analyze` output: Sobol' rows (``S1``,
        ``S1_conf``, ``ST``, ``ST_conf``) or Morris rows (``mu_star``, ``mu_star_conf``,
        ``sigma``).
    """
    keys = list(dict.fromkeys(zip(indices["metric"], indices["arm"], strict=True)))
    ncols = min(3, len(keys))
    nrows = -(-len(keys) // ncols)
    fig = _figure(3.2 * ncols + 0.3, 2.6 * nrows + 0.4)
    axes = _subplots(fig, nrows, ncols)
    sobol = "S1" in indices.columns
    for k, (metric, arm) in enumerate(keys):
        ax = axes[k // ncols][k % ncols]
        sub = indices[(indices["metric"] == metric) & (indices["arm"] == arm)]
        y = np.arange(len(sub))
        if sobol:
            ax.barh(
                y - 0.2,
                sub["S1"],
                height=0.38,
                xerr=sub["S1_conf"],
                color="C0",
                label="first order S1",
                error_kw={"lw": 0.8},
            )
            ax.barh(
                y + 0.2,
                sub["ST"],
                height=0.38,
                xerr=sub["ST_conf"],
                color="C1",
                label="total ST",
                error_kw={"lw": 0.8},
            )
            ax.set_xlabel("Sobol' index (share of output variance)")
        else:
            ax.barh(
                y,
                sub["mu_star"],
                height=0.6,
                xerr=sub["mu_star_conf"],
                color="C0",
                label="mu* (mean |elementary effect|)",
                error_kw={"lw": 0.8},
            )
            ax.plot(sub["sigma"], y, "D", color="C1", ms=4, label="sigma (spread of effects)")
            ax.set_xlabel(f"elementary effect ({metric_label(metric)})", fontsize=7)
        ax.axvline(0, color="#333333", lw=0.8)
        ax.set_yticks(y, sub["parameter"].tolist())
        ax.set_ylim(len(sub) - 0.5, -0.5)
        ax.set_title(metric + (f" ({arm})" if arm else ""), fontsize=9)
    for k in range(len(keys), nrows * ncols):
        axes[k // ncols][k % ncols].set_visible(False)
    axes[0][0].legend(loc="best", fontsize=7)
    return fig
