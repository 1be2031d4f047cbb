"""One buyer meets one seller: the worked example behind every market, as a readable table.

``propensim pair`` prints it for an invented buyer and seller (or the ones given on the command
line): each curve's preferred price, width, reservation price and the force it exerts at the
joint price, the pair's trade probability and price distribution, and the oscillator levels of
each trader's price spring.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class PairExample:
    """An invented buyer (a café roaster buying green beans) and seller (a small estate)."""

    buyer_mu: float = 95.0
    buyer_sigma: float = 6.0
    seller_mu: float = 105.0
    seller_sigma: float = 8.0
    gamma: float = 1.0
    levels: int = 3


def pair_rows(ex: PairExample = PairExample()) -> list[tuple[str, str, str]]:
    """The table as ``(quantity, buyer, seller)`` rows of text (pair-wide rows fill both)."""
    from propensim.agents.curves import NormalCurve
    from propensim.agents.joint_curve import joint
    from propensim.agents.oscillator import level_energies, oscillator_mass

    b = NormalCurve(mu=ex.buyer_mu, sigma=ex.buyer_sigma)
    s = NormalCurve(mu=ex.seller_mu, sigma=ex.seller_sigma)
    j = joint(b, s)
    x = float(j.mean)
    rows = [
        ("preferred price mu", f"{ex.buyer_mu:.2f}", f"{ex.seller_mu:.2f}"),
        ("price uncertainty sigma", f"{ex.buyer_sigma:.2f}", f"{ex.seller_sigma:.2f}"),
        (
            "reservation price (P = 1/2)",
            f"{float(b.reservation_price(0.5, side='buyer')):.2f}",
            f"{float(s.reservation_price(0.5, side='seller')):.2f}",
        ),
        (
            f"acceptance P at joint price {x:.2f}",
            f"{float(b.value(x)):.4f}",
            f"{float(s.value(x)):.4f}",
        ),
        (
            "entropic force at joint price",
            f"{float(b.force(x, ex.gamma)):+.4f}",
            f"{float(s.force(x, ex.gamma)):+.4f}",
        ),
        (
            "spring stiffness gamma/sigma^2",
            f"{ex.gamma / ex.buyer_sigma**2:.4f}",
            f"{ex.gamma / ex.seller_sigma**2:.4f}",
        ),
        (
            "oscillator mass hbar^2/(4 gamma sigma^2)",
            f"{float(oscillator_mass(ex.gamma, ex.buyer_sigma)):.5f}",
            f"{float(oscillator_mass(ex.gamma, ex.seller_sigma)):.5f}",
        ),
    ]
    for n in range(ex.levels):
        energy = float(level_energies(n, ex.gamma))
        sd_b = np.sqrt(2 * n + 1) * ex.buyer_sigma
        sd_s = np.sqrt(2 * n + 1) * ex.seller_sigma
        rows.append((f"level {n}: energy {energy:.1f}, price sd", f"{sd_b:.2f}", f"{sd_s:.2f}"))
    both = "(pair)"
    rows += [
        ("trade probability per meeting (joint peak)", f"{float(j.peak):.4f}", both),
        ("joint price mean", f"{float(j.mean):.2f}", both),
        ("joint price sd", f"{float(j.sd):.2f}", both),
    ]
    return rows


def pair_table(ex: PairExample = PairExample()) -> str:
    """The table as aligned plain text."""
    rows = [("", "buyer", "seller"), *pair_rows(ex)]
    w0 = max(len(r[0]) for r in rows)
    w1 = max(len(r[1]) for r in rows)
    return "\n".join(f"{a:<{w0}}  {b:>{w1}}  {c:>8}" for a, b, c in rows)
