"""Drift rules: how the traders' curves move between rounds.

Each trader's preferred price ``mu`` follows overdamped Langevin dynamics (MODEL.md section 5)::

    d mu = (1 / eta) F_total dt + sqrt(2 D) dW

with mobility ``1 / eta`` (price per force per time), diffusion coefficient ``D`` (``noise``,
price^2 per time) and ``F_total`` the sum of the entropic forces the trader feels.

**A drift is a sum of forces.** Every force rule here contributes a force that is linear in the
trader's own ``mu``::

    F = offset - stiffness * mu          # arrays of shape (n,)

through a method ``terms(state, outcome) -> (stiffness, offset)``, and may also change the curve
width through ``update_sigma(state, outcome, sigma) -> sigma``. :func:`combine` sums the terms of
several rules (total stiffness ``k``, total offset ``c``) and takes one *exact* step of the
resulting Ornstein-Uhlenbeck process: with ``x = k dt / eta``,

    mu' = mu e^(-x) + (c dt / eta) phi(x) + sqrt(2 D dt phi(2 x)) xi,   phi(x) = (1 - e^(-x)) / x,

which for ``k > 0`` is the OU update around the rest point ``m = c / k`` (decay ``e^(-k dt/eta)``,
stationary variance ``D eta / k``) and for ``k == 0`` (``phi(0) = 1``) is the exact Brownian step
with constant drift ``c / eta``. The step is exact for any ``dt``: large steps stay stable, unlike
an Euler step. Neighbours' prices enter a trader's force at their values at the start of the step
(the force is linear in the trader's own price only), so a coupled rule such as
:class:`SocialDrift` is exact per trader given its neighbours, not for the network as a whole.

Each single rule is also a complete :class:`~propensim.plugins.contracts.DriftRule`: its
``apply`` is ``combine([rule], eta=rule.eta, noise=rule.noise, dt=rule.dt).apply``.

References
----------
G. E. Uhlenbeck and L. S. Ornstein, "On the theory of the Brownian motion", Phys. Rev. 36:823
(1930). D. T. Gillespie, "Exact numerical simulation of the Ornstein-Uhlenbeck process and its
integral", Phys. Rev. E 54:2084 (1996).
"""

from __future__ import annotations

import math
import weakref
from collections.abc import Iterable
from typing import ClassVar

import numpy as np

from propensim.agents.population import BUYER, SELLER
from propensim.plugins import acceleration
from propensim.plugins.types import MarketState, RoundOutcome

__all__ = [
    "AnchorDrift",
    "DriftSum",
    "NoDrift",
    "OutcomeDrift",
    "SocialDrift",
    "WidthAdaptation",
    "combine",
    "ou_step",
]


# -- parameter checks ----------------------------------------------------------------------------
def _number(owner: str, name: str, value) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{owner}: {name} must be a number, got {value!r}") from None
    if math.isnan(out):
        raise ValueError(f"{owner}: {name} must be a number, got NaN")
    return out


def _require(owner: str, name: str, value, ok, allowed: str) -> None:
    """Raise a one-line ValueError unless ``ok(float(value))``."""
    x = _number(owner, name, value)
    if not ok(x):
        raise ValueError(f"{owner}: {name} must be {allowed}, got {value!r}")


def _check_langevin(owner: str, eta, noise, dt) -> None:
    _require(owner, "eta", eta, lambda x: 0 < x < math.inf, "> 0 and finite")
    _require(owner, "noise", noise, lambda x: 0 <= x < math.inf, ">= 0 and finite")
    _require(owner, "dt", dt, lambda x: 0 < x < math.inf, "> 0 and finite")


# -- the exact step ------------------------------------------------------------------------------
def _ou_coefficients(
    stiffness: np.ndarray, eta: float, noise: float, dt: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """``(decay, gain, sd)`` of the exact step ``mu' = mu decay + offset gain + sd xi``.

    With ``x = k dt / eta``: ``decay = exp(-x)``, ``gain = (dt / eta) phi(x)`` and
    ``sd = sqrt(2 D dt phi(2 x))`` (None when ``D = 0``), with ``phi(2 x)`` from ``phi(x)``
    through ``phi(2 x) = phi(x) (1 + exp(-x)) / 2`` (since
    ``1 - e^(-2x) = (1 - e^(-x)) (1 + e^(-x))``).
    """
    x = np.asarray(stiffness, dtype=float) * (dt / eta)  # shape: (n,)
    tiny = np.abs(x) < 1e-8  # shape: (n,) phi by its series: 1 - x / 2
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        em1 = np.expm1(-x)  # shape: (n,) exp(-x) - 1
        phi = em1 / x
        np.negative(phi, out=phi)  # shape: (n,) phi(x) = (1 - exp(-x)) / x
    if tiny.any():
        phi[tiny] = 1.0 - 0.5 * x[tiny]
    decay = np.exp(-x)  # shape: (n,) (not 1 + em1: that loses digits where exp(-x) is small)
    gain = phi * (dt / eta)  # shape: (n,)
    sd = None
    if noise != 0:
        sd = decay + 1.0
        sd *= phi
        sd *= noise * dt  # shape: (n,) 2 D dt phi(2 x) = D dt phi(x) (1 + exp(-x))
        np.sqrt(sd, out=sd)
    if x.ndim == 1 and acceleration.is_uniform(x):  # one stiffness for all: scalars
        return float(decay[0]), float(gain[0]), None if sd is None else float(sd[0])
    return decay, gain, sd


def _ou_apply(mu, offset, coefficients, rng) -> np.ndarray:
    """``mu decay + offset gain + sd xi`` (one standard normal per trader when sd is set).

    Large markets take this step in one compiled pass (:mod:`propensim.plugins.acceleration`):
    the same numbers, drawn from ``rng`` in the same order.
    """
    decay, gain, sd = coefficients
    if sd is not None and rng is not None and _fits_kernel(mu, offset, decay, gain, sd):
        out = np.empty(mu.shape)  # shape: (n,)
        if acceleration.ou_apply(mu, offset, decay, gain, sd, rng, out):  # same numbers, one pass
            return out
    out = np.multiply(mu, decay)  # shape: (n,)
    tmp = np.empty_like(out)  # shape: (n,) for the temporaries
    out += np.multiply(offset, gain, out=tmp)
    if sd is not None:
        if rng is None:
            raise ValueError("ou_step: rng is required when noise > 0")
        xi = rng.standard_normal(out=tmp)  # shape: (n,)
        xi *= sd
        out += xi
    return out


def _fits_kernel(mu, *columns) -> bool:
    """True if ``mu`` is one float column and each of ``columns`` a scalar or a column like it."""
    if not (isinstance(mu, np.ndarray) and mu.ndim == 1 and mu.dtype == np.float64):
        return False
    return all(np.ndim(c) == 0 or np.shape(c) == mu.shape for c in columns)


def ou_step(
    mu: np.ndarray,
    stiffness: np.ndarray,
    offset: np.ndarray,
    *,
    eta: float = 1.0,
    noise: float = 0.0,
    dt: float = 1.0,
    rng: np.random.Generator | None = None,
) -> np.ndarray:
    """One exact step of ``d mu = (offset - stiffness * mu) / eta dt + sqrt(2 noise) dW``.

    Parameters
    ----------
    mu : ndarray, shape (n,)
        Preferred prices now (price units).
    stiffness, offset : ndarray, shape (n,) or scalar
        Total force ``F = offset - stiffness * mu`` (stiffness in force per price, offset in force).
    eta : float
        Friction (force time per price); the mobility is ``1 / eta``.
    noise : float
        Diffusion coefficient ``D`` (price^2 per time), ``>= 0``.
    dt : float
        Time step (> 0; any size: the step is exact).
    rng : numpy.random.Generator, optional
        Needed only when ``noise > 0``; ``n`` standard normal draws are taken from it.

    Returns
    -------
    ndarray, shape (n,)
        The new preferred prices. For ``stiffness > 0`` the conditional law is normal with mean
        ``m + (mu - m) exp(-k dt / eta)`` (``m = offset / stiffness``) and variance
        ``(D eta / k) (1 - exp(-2 k dt / eta))``; for ``stiffness == 0`` mean
        ``mu + offset dt / eta`` and variance ``2 D dt``.

    References
    ----------
    Uhlenbeck and Ornstein, Phys. Rev. 36:823 (1930) (the process and its stationary law);
    Gillespie, Phys. Rev. E 54:2084 (1996) (the exact update).
    """
    mu = np.asarray(mu, dtype=float)
    if noise != 0 and rng is None:
        raise ValueError("ou_step: rng is required when noise > 0")
    stiffness = np.broadcast_to(np.asarray(stiffness, dtype=float), mu.shape)
    coefficients = _ou_coefficients(stiffness, float(eta), float(noise), float(dt))
    return _ou_apply(mu, np.asarray(offset, dtype=float), coefficients, rng)


# -- who could trade -----------------------------------------------------------------------------
def _outcome_masks(state: MarketState, outcome: RoundOutcome) -> tuple[np.ndarray, np.ndarray]:
    """``(traded, missed)`` boolean masks of shape (n,).

    A trader *missed* when it did not trade although it could have: it had capacity, a seller had
    stock, a buyer had cash. Traders who could not trade at all (out of stock, out of cash, zero
    capacity) are neither, so outcome rules leave them alone.
    """
    pop = state.population
    traded = np.asarray(outcome.traded) > 0  # shape: (n,)
    out_of_stock = (pop.role == SELLER) & (pop.stock <= 0)  # shape: (n,)
    out_of_cash = (pop.role == BUYER) & (pop.cash <= 0)  # shape: (n,)
    could_trade = (pop.capacity > 0) & ~out_of_stock & ~out_of_cash  # shape: (n,)
    missed = ~traded & could_trade  # shape: (n,)
    return traded, missed


# -- the base of the force rules -----------------------------------------------------------------
#: The one-rule sum each force rule applies itself with (kept, so its checks run once).
_ALONE: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()


class _ForceRule:
    """Shared behaviour of the built-in force rules (not part of the contract)."""

    eta: float = 1.0
    noise: float = 0.0
    dt: float = 1.0

    def terms(self, state: MarketState, outcome: RoundOutcome) -> tuple[np.ndarray, np.ndarray]:
        """Linear force ``F = offset - stiffness * mu``: return ``(stiffness, offset)``."""
        n = len(state.population)
        return np.zeros(n), np.zeros(n)

    def update_sigma(
        self, state: MarketState, outcome: RoundOutcome, sigma: np.ndarray
    ) -> np.ndarray:
        """New curve widths given the current ones (default: unchanged)."""
        return sigma

    def check(self) -> None:
        """Raise ValueError naming a parameter out of range."""
        _check_langevin(type(self).__name__, self.eta, self.noise, self.dt)

    def apply(
        self, state: MarketState, outcome: RoundOutcome, rng: np.random.Generator
    ) -> tuple[np.ndarray, np.ndarray]:
        """Apply the rule alone: ``combine([self], eta=self.eta, noise=self.noise, dt=self.dt)``."""
        params = (self.eta, self.noise, self.dt)
        kept = _ALONE.get(self)
        if kept is None or kept[0] != params:  # one sum per rule and parameters, checked once
            kept = (params, DriftSum(rules=(self,), eta=self.eta, noise=self.noise, dt=self.dt))
            _ALONE[self] = kept
        return kept[1].apply(state, outcome, rng)

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in vars(self).items() if k != "plugin_name")
        return f"{type(self).__name__}({params})"


class NoDrift(_ForceRule):
    """Curves stay where they are.

    ``apply`` returns copies of ``mu`` and ``sigma``; in a sum it contributes no force.
    """

    description: ClassVar[str] = "curves do not move between rounds"
    odd_notes: ClassVar[dict[str, str]] = {
        "adaptation": ("None: curves stay as they are."),
    }

    def __init__(self) -> None:
        pass

    def check(self) -> None:
        """Nothing to check."""

    def apply(
        self, state: MarketState, outcome: RoundOutcome, rng: np.random.Generator
    ) -> tuple[np.ndarray, np.ndarray]:
        """Return unchanged copies of ``mu`` and ``sigma``."""
        pop = state.population
        return pop.mu.copy(), pop.sigma.copy()


class AnchorDrift(_ForceRule):
    """The spring of a trader's own curve around its private value or cost.

    The normal curve centred on the trader's value ``v`` with the trader's width ``sigma`` exerts
    the entropic force ``F = -strength * gamma (mu - v) / sigma^2`` (MODEL.md section 2): a linear
    spring of stiffness ``k = strength * gamma / sigma^2`` with rest point ``v``. Alone it makes
    ``mu`` an Ornstein-Uhlenbeck process with stationary mean ``v``, variance ``D eta / k`` and
    autocorrelation ``exp(-k t / eta)``.

    Parameters
    ----------
    eta : float
        Friction (> 0); mobility ``1 / eta``.
    noise : float
        Diffusion coefficient ``D`` (price^2 per time, >= 0).
    dt : float
        Time per round (> 0).
    strength : float
        Multiplier of the spring (>= 0, dimensionless).

    References
    ----------
    Uhlenbeck and Ornstein, Phys. Rev. 36:823 (1930); Gillespie, Phys. Rev. E 54:2084 (1996).
    """

    description: ClassVar[str] = "spring of each trader's curve around its private value or cost"
    odd_notes: ClassVar[dict[str, str]] = {
        "adaptation": (
            "Each trader's preferred price relaxes toward its private value or cost under the "
            "entropic force of its own curve (an exact Ornstein-Uhlenbeck step)."
        ),
        "basic_principles": (
            "Entropic force F = gamma d/dx ln P: the curve is a spring whose stiffness is "
            "gamma / sigma^2."
        ),
        "stochasticity": ("Optional Gaussian noise on preferred prices (the drift stream)."),
    }

    def __init__(
        self, eta: float = 1.0, noise: float = 0.0, dt: float = 1.0, strength: float = 1.0
    ) -> None:
        self.eta = eta
        self.noise = noise
        self.dt = dt
        self.strength = strength

    def check(self) -> None:
        """Raise ValueError naming a parameter out of range."""
        super().check()
        _require("AnchorDrift", "strength", self.strength, lambda x: 0 <= x < math.inf, ">= 0")

    def terms(self, state: MarketState, outcome: RoundOutcome) -> tuple[np.ndarray, np.ndarray]:
        """``stiffness = strength * gamma / sigma^2``, ``offset = stiffness * value``."""
        pop = state.population
        if acceleration.is_uniform(pop.gamma) and acceleration.is_uniform(pop.sigma):
            # One stiffness for every trader (one width, one scale: the common case): a scalar,
            # so the exact step's coefficients are scalars too. Same values as the array path.
            k = np.float64(pop.gamma[0]) / np.square(np.float64(pop.sigma[0]))
            if self.strength != 1:
                k *= self.strength
            return k, pop.value * k
        stiffness = pop.gamma / np.square(pop.sigma)  # shape: (n,)
        if self.strength != 1:
            stiffness *= self.strength
        return stiffness, stiffness * pop.value


class OutcomeDrift(_ForceRule):
    """Learning from the round: winners ask for a better price, losers concede.

    A constant force of size ``step`` (stiffness 0): a buyer who traded is pushed down (it asks a
    lower price next time) and a seller who traded up; a trader who missed a trade it could have
    made concedes toward the other side (buyer up, seller down). Traders who could not trade
    (no capacity, a seller without stock, a buyer without cash) feel nothing. With ``eta = dt = 1``
    and no other force, ``mu`` moves by exactly ``step`` per round.

    Parameters
    ----------
    step : float
        Force size (>= 0; price per time when ``eta = 1``).
    eta, noise, dt : float
        As in :class:`AnchorDrift`.

    References
    ----------
    A simple adaptive-aspiration rule in the spirit of D. Cliff and J. Bruten, HP Labs
    HPL-97-141 (1997): traders raise their margins after a trade and lower them after a miss.
    """

    description: ClassVar[str] = "traders who traded ask a better price, traders who missed concede"
    odd_notes: ClassVar[dict[str, str]] = {
        "adaptation": (
            "Traders who traded ask a better price next round, traders who could trade but "
            "missed concede."
        ),
        "learning": (
            "A simple reinforcement of the last round's outcome; no memory beyond the current "
            "curve."
        ),
        "sensing": ("A trader senses only whether it traded this round."),
    }

    def __init__(
        self, step: float = 0.5, eta: float = 1.0, noise: float = 0.0, dt: float = 1.0
    ) -> None:
        self.step = step
        self.eta = eta
        self.noise = noise
        self.dt = dt

    def check(self) -> None:
        """Raise ValueError naming a parameter out of range."""
        super().check()
        _require("OutcomeDrift", "step", self.step, lambda x: 0 <= x < math.inf, ">= 0 and finite")

    def terms(self, state: MarketState, outcome: RoundOutcome) -> tuple[np.ndarray, np.ndarray]:
        """Stiffness 0; offset ``-step`` / ``+step`` by role and outcome."""
        pop = state.population
        offset = acceleration.outcome_offset(pop, outcome.traded, float(self.step))
        if offset is not None:  # one compiled pass: the same numbers
            # A scalar stiffness, as AnchorDrift's for one width: the sum's coefficients stay
            # scalars (the same numbers as from a column of zeros).
            return np.float64(0.0), offset
        traded, missed = _outcome_masks(state, outcome)
        better = np.where(pop.role == BUYER, -1.0, 1.0)  # shape: (n,): a better price for them
        direction = np.where(traded, better, np.where(missed, -better, 0.0))  # shape: (n,)
        return np.zeros(len(pop)), self.step * direction


class SocialDrift(_ForceRule):
    """The pull of network neighbours' curves.

    Trader ``i`` feels the entropic force of each neighbour ``j``'s normal curve at its own price,
    averaged over its neighbours (normalised by degree, so a hub is not pulled harder than a
    trader with one neighbour)::

        F_i = strength * gamma_i / deg_i * sum_j -(mu_i - mu_j) / sigma_j^2

    Neighbours are the edges of ``state.network.social`` (both directions, whatever the roles);
    a trader without neighbours feels nothing. Linear in ``mu_i``: stiffness
    ``strength * gamma_i / deg_i * sum_j 1 / sigma_j^2``. Neighbours' ``mu_j`` are taken at the
    start of the step.

    Parameters
    ----------
    strength : float
        Multiplier (>= 0).
    eta, noise, dt : float
        As in :class:`AnchorDrift`.

    References
    ----------
    The entropic force ``F = gamma d/dx ln P`` of MODEL.md section 2 applied to a neighbour's
    normal curve; averaging over neighbours as in linear opinion dynamics (M. H. DeGroot,
    J. Am. Stat. Assoc. 69:118-121, 1974).
    """

    description: ClassVar[str] = "pull of each trader's price toward its network neighbours' curves"
    odd_notes: ClassVar[dict[str, str]] = {
        "adaptation": (
            "Each trader's preferred price is pulled toward its network neighbours' curves."
        ),
        "sensing": ("Traders sense their neighbours' preferred prices."),
        "interaction": ("Through the social edges of the network, whatever the neighbours' roles."),
    }

    def __init__(
        self, strength: float = 1.0, eta: float = 1.0, noise: float = 0.0, dt: float = 1.0
    ) -> None:
        self.strength = strength
        self.eta = eta
        self.noise = noise
        self.dt = dt

    def check(self) -> None:
        """Raise ValueError naming a parameter out of range."""
        super().check()
        _require("SocialDrift", "strength", self.strength, lambda x: 0 <= x < math.inf, ">= 0")

    def terms(self, state: MarketState, outcome: RoundOutcome) -> tuple[np.ndarray, np.ndarray]:
        """Degree-normalised sum of neighbours' springs."""
        pop = state.population
        n = len(pop)
        u, v = state.network.social
        u = np.asarray(u, dtype=np.int64)
        v = np.asarray(v, dtype=np.int64)
        not_loop = u != v  # shape: (n_social,)
        u, v = u[not_loop], v[not_loop]
        weight = 1.0 / pop.sigma[v] ** 2  # shape: (n_social,)
        degree = np.bincount(u, minlength=n)  # shape: (n,)
        sum_w = np.bincount(u, weights=weight, minlength=n)  # shape: (n,)
        sum_wmu = np.bincount(u, weights=weight * pop.mu[v], minlength=n)  # shape: (n,)
        scale = self.strength * pop.gamma / np.maximum(degree, 1)  # shape: (n,)
        return scale * sum_w, scale * sum_wmu


class WidthAdaptation(_ForceRule):
    """Curves narrow after a trade and widen after a miss.

    ``sigma *= (1 - narrow)`` for a trader who traded, ``sigma *= (1 + widen)`` for one who
    missed a trade it could have made, then clipped to ``[sigma_min, sigma_max]``; traders who
    could not trade keep their width. No force on ``mu``.

    Parameters
    ----------
    narrow : float
        Fractional narrowing after a trade, in [0, 1).
    widen : float
        Fractional widening after a miss, >= 0.
    sigma_min, sigma_max : float
        Bounds of the width (price units, ``0 < sigma_min <= sigma_max``; ``sigma_max`` may be inf).

    References
    ----------
    MODEL.md section 5 (sigma narrows after trades, widens after misses); the multiplicative
    update with clipping is common practice, no source.
    """

    description: ClassVar[str] = "curves narrow after a trade and widen after a miss"
    odd_notes: ClassVar[dict[str, str]] = {
        "adaptation": (
            "Curves narrow after a trade (more certainty about the price) and widen after a miss."
        ),
        "sensing": ("A trader senses only whether it traded this round."),
    }

    def __init__(
        self,
        narrow: float = 0.05,
        widen: float = 0.05,
        sigma_min: float = 1e-3,
        sigma_max: float = math.inf,
    ) -> None:
        self.narrow = narrow
        self.widen = widen
        self.sigma_min = sigma_min
        self.sigma_max = sigma_max

    def check(self) -> None:
        """Raise ValueError naming a parameter out of range."""
        owner = "WidthAdaptation"
        _require(owner, "narrow", self.narrow, lambda x: 0 <= x < 1, "in [0, 1)")
        _require(owner, "widen", self.widen, lambda x: 0 <= x < math.inf, ">= 0 and finite")
        _require(owner, "sigma_min", self.sigma_min, lambda x: 0 < x < math.inf, "> 0 and finite")
        lo = float(self.sigma_min)
        _require(owner, "sigma_max", self.sigma_max, lambda x: x >= lo, f">= sigma_min ({lo})")

    def update_sigma(
        self, state: MarketState, outcome: RoundOutcome, sigma: np.ndarray
    ) -> np.ndarray:
        """Multiply by ``1 - narrow`` or ``1 + widen``, then clip."""
        traded, missed = _outcome_masks(state, outcome)
        factor = np.where(traded, 1.0 - self.narrow, np.where(missed, 1.0 + self.widen, 1.0))
        new = np.clip(sigma * factor, self.sigma_min, self.sigma_max)  # shape: (n,)
        return np.minimum(new, np.finfo(float).max)

    def apply(
        self, state: MarketState, outcome: RoundOutcome, rng: np.random.Generator
    ) -> tuple[np.ndarray, np.ndarray]:
        """Keep ``mu``, adapt ``sigma``."""
        return DriftSum(rules=(self,)).apply(state, outcome, rng)


#: Key of the per-market cache entry holding the last exact-step coefficients.
_OU_CACHE_KEY = "drift.ou_coefficients"


def _column(values, n: int) -> np.ndarray:
    """``values`` as a float array of shape (n,) (broadcast and copied if it is not one)."""
    out = np.asarray(values, dtype=float)
    return out if out.shape == (n,) else np.array(np.broadcast_to(out, (n,)), dtype=float)


class DriftSum:
    """Several drift rules acting at once: forces stepped exactly as one Ornstein-Uhlenbeck process.

    Sums the ``terms`` of every force rule into a total stiffness ``k`` and offset ``c`` and takes
    one exact step (see the module docstring and :func:`ou_step`) over ``dt`` times the state's
    ``elapsed`` time; the rules' own ``eta``, ``noise`` and ``dt`` are ignored in favour of the
    sum's. Then applies each force rule's ``update_sigma`` in order. Finally each rule that has
    only ``apply`` (any :class:`~propensim.plugins.contracts.DriftRule`, e.g. a student's
    per-agent rule) is applied in order to the curves left by the step before it: forces add,
    other rules compose. A ``DriftSum`` has ``terms`` and ``update_sigma`` itself, so sums nest.

    Parameters
    ----------
    rules : sequence of force rules
        Objects with ``terms(state, outcome) -> (stiffness, offset)`` and optionally
        ``update_sigma(state, outcome, sigma)``.
    eta : float
        Friction (> 0).
    noise : float
        Diffusion coefficient ``D`` (price^2 per time, >= 0); one standard normal draw per trader
        per step when > 0, none otherwise.
    dt : float
        Time per round (> 0).

    References
    ----------
    Uhlenbeck and Ornstein, Phys. Rev. 36:823 (1930); Gillespie, Phys. Rev. E 54:2084 (1996).
    """

    description: ClassVar[str] = "sum of force rules stepped exactly as one Ornstein-Uhlenbeck move"
    odd_notes: ClassVar[dict[str, str]] = {
        "adaptation": (
            "Several drift rules at once: forces add into one exact Ornstein-Uhlenbeck step; "
            "rules without a force part are applied after it, in order."
        ),
    }

    def __init__(
        self, rules: Iterable = (), eta: float = 1.0, noise: float = 0.0, dt: float = 1.0
    ) -> None:
        self.rules = rules
        self.eta = eta
        self.noise = noise
        self.dt = dt

    def check(self) -> None:
        """Raise ValueError for bad parameters or a rule that cannot be summed."""
        key = _parameters(self)
        try:
            same = key is not None and self.__dict__.get("_checked") == key
        except (TypeError, ValueError):  # parameters that do not compare (arrays)
            same = False
        if same:
            return  # checked already, with these very parameters
        self._check()
        self._plan = _force_plan(self.rules)
        self._fused = None  # worked out again for these rules
        self._checked = key

    def _check(self) -> None:
        _check_langevin("DriftSum", self.eta, self.noise, self.dt)
        for rule in self.rules:
            if not callable(getattr(rule, "terms", None)) and not callable(
                getattr(rule, "apply", None)
            ):
                raise ValueError(
                    f"DriftSum: every rule needs terms() (a force) or apply() (a drift rule); "
                    f"{type(rule).__name__} has neither"
                )
            check = getattr(rule, "check", None)
            if callable(check):
                check()

    def terms(self, state: MarketState, outcome: RoundOutcome) -> tuple[np.ndarray, np.ndarray]:
        """Total ``(stiffness, offset)`` of the rules, shape (n,) each."""
        n = len(state.population)
        k, c = self._summed_terms(state, outcome)
        return _column(k, n), _column(c, n)

    def _forces(self) -> list:
        """The rules that are forces (have ``terms``), in order."""
        return [r for r in self.rules if callable(getattr(r, "terms", None))]

    def _summed_terms(self, state: MarketState, outcome: RoundOutcome):
        """Total ``(stiffness, offset)``: float scalars where every rule gives one, else (n,).

        A scalar stiffness (one for every trader) makes the exact step's coefficients scalars.
        """
        n = len(state.population)
        forces = self._forces()
        if len(forces) == 1:  # no sum to build
            k, c = forces[0].terms(state, outcome)
            k, c = np.asarray(k, dtype=float), np.asarray(c, dtype=float)
            return (k if k.ndim == 0 else _column(k, n)), (c if c.ndim == 0 else _column(c, n))
        stiffness = offset = np.float64(0.0)
        for rule in forces:  # summed in rule order: scalars stay scalars, columns broadcast
            k, c = rule.terms(state, outcome)
            stiffness = stiffness + np.asarray(k, dtype=float)
            offset = offset + np.asarray(c, dtype=float)
        return stiffness, offset

    def update_sigma(
        self, state: MarketState, outcome: RoundOutcome, sigma: np.ndarray
    ) -> np.ndarray:
        """Each force rule's width update, in order."""
        for rule in self._forces():
            update = getattr(rule, "update_sigma", None)
            if callable(update):
                sigma = update(state, outcome, sigma)
        return sigma

    def apply(
        self, state: MarketState, outcome: RoundOutcome, rng: np.random.Generator
    ) -> tuple[np.ndarray, np.ndarray]:
        """Return new ``(mu, sigma)``; the population is not modified."""
        self.check()
        fused = self._fused_apply(state, outcome, rng)
        if fused is not None:
            return fused
        pop = state.population
        stiffness, offset = self._summed_terms(state, outcome)
        # The step covers the time since the last one: one round (``dt``) in round mode, the
        # elapsed time in event mode (MarketState.elapsed, in rounds).
        elapsed = float(getattr(state, "elapsed", 1.0))
        params = (float(self.eta), float(self.noise), float(self.dt) * elapsed)
        # The step's coefficients depend only on the stiffness, which stays the same from round
        # to round unless a rule moves it (e.g. widths adapting): reuse them while it does.
        # A scalar stiffness (one for every trader) gives scalar coefficients, computed from
        # a one-element column so that they equal the array path's bit for bit.
        cached = state.cache.get(_OU_CACHE_KEY)
        if (
            cached is not None
            and cached[0] == params
            and cached[1].shape == stiffness.shape
            and np.array_equal(cached[1], stiffness)
        ):
            coefficients = cached[2]
        else:
            column = stiffness.reshape(1) if stiffness.ndim == 0 else stiffness
            coefficients = _ou_coefficients(column, *params)
            state.cache[_OU_CACHE_KEY] = (params, np.array(stiffness, copy=True), coefficients)
        mu = _ou_apply(pop.mu, offset, coefficients, rng)
        sigma = np.asarray(self.update_sigma(state, outcome, pop.sigma.copy()), dtype=float)
        if sigma is pop.sigma:  # a rule handed back the population's own column
            sigma = sigma.copy()
        for rule in self.rules:  # rules with only apply(): in order, each on the last's result
            if not callable(getattr(rule, "terms", None)):
                mu, sigma = _apply_after(rule, state, outcome, rng, mu, sigma)
        return mu, sigma

    def _fused_apply(self, state: MarketState, outcome: RoundOutcome, rng):
        """:meth:`apply` in one compiled pass (``numba_loops.force_step``), or None.

        For the common sums: anchor and outcome forces only, every trader with one width and one
        energy scale (so one stiffness). The same numbers as the general path below: the
        stiffness is summed in rule order as :meth:`_summed_terms` sums it, the coefficients come
        from :func:`_ou_coefficients` and the kernel adds the offsets in the same order. What
        the kernel is handed besides the columns depends only on the step, the first trader's
        scale and width and the rules: worked out once and kept (``self._fused``) while those
        stay the same.
        """
        plan = self.__dict__.get("_plan")
        pop = state.population
        if plan is None or len(pop) == 0:
            return None
        kinds = plan[0]
        elapsed = float(getattr(state, "elapsed", 1.0))
        step = (float(self.eta), float(self.noise), float(self.dt) * elapsed)
        key = (step, float(pop.gamma[0]), float(pop.sigma[0])) if _ANCHOR in kinds else step
        kept = self.__dict__.get("_fused")
        if kept is None or kept[0] != key:
            kept = (key, self._fused_arguments(plan, step, pop))
            self._fused = kept
        traded = outcome.traded if _OUTCOME in kinds else None  # anchors do not read it
        mu = acceleration.force_step(kept[1], pop, traded, rng)
        return None if mu is None else (mu, pop.sigma.copy())

    @staticmethod
    def _fused_arguments(plan, step, pop) -> tuple:
        """``numba_loops.force_step``'s fixed arguments for ``step`` and ``pop``'s first trader."""
        kinds, numbers, codes = plan
        spring = None
        if _ANCHOR in kinds:  # AnchorDrift.terms for one width and one scale: a scalar
            spring = np.float64(pop.gamma[0]) / np.square(np.float64(pop.sigma[0]))
        params = np.empty(len(kinds))
        stiffness = np.float64(0.0)
        for r, (kind, number) in enumerate(zip(kinds, numbers, strict=True)):
            if kind == _ANCHOR:
                k = spring * number if number != 1 else spring
                params[r] = k
            else:  # an outcome force: stiffness 0, offset step * direction
                k = np.float64(0.0)
                params[r] = number
            stiffness = k if len(kinds) == 1 else stiffness + k
        decay, gain, sd = _ou_coefficients(np.array([stiffness]), *step)
        noisy = sd is not None
        coefficients = np.array([decay, gain, sd if noisy else 0.0])
        return (codes, params, len(kinds) > 1, _ANCHOR in kinds, coefficients, noisy)

    def __repr__(self) -> str:
        return (
            f"DriftSum(rules={list(self.rules)!r}, eta={self.eta!r}, noise={self.noise!r}, "
            f"dt={self.dt!r})"
        )


#: Force kinds of ``numba_loops.force_step`` (kept equal to its ANCHOR and OUTCOME).
_ANCHOR, _OUTCOME = 0, 1


def _force_plan(rules) -> tuple | None:
    """``(kinds, numbers, kinds as int64)`` when every rule is a plain anchor or outcome force.

    ``numbers`` are the anchors' strengths and the outcome rules' steps. Subclasses do not
    qualify (they may change ``terms``); neither do sums, widths that adapt or other rules.
    """
    kinds, numbers = [], []
    for rule in rules:
        if type(rule) is AnchorDrift:
            kinds.append(_ANCHOR)
            numbers.append(float(rule.strength))
        elif type(rule) is OutcomeDrift:
            kinds.append(_OUTCOME)
            numbers.append(float(rule.step))
        else:
            return None
    if not kinds:
        return None
    return tuple(kinds), tuple(numbers), np.array(kinds, dtype=np.int64)


def _parameters(drift: DriftSum):
    """The numbers :meth:`DriftSum.check` depends on (None when they cannot be compared)."""
    try:
        rules = tuple(drift.rules)
        return (
            drift.eta,
            drift.noise,
            drift.dt,
            rules,
            tuple(tuple(vars(r).items()) for r in rules),
        )
    except TypeError:  # a rule without vars (slots): check every time
        return None


def _apply_after(rule, state: MarketState, outcome: RoundOutcome, rng, mu, sigma):
    """Apply a rule that has only ``apply`` to the curves ``(mu, sigma)`` left by earlier rules.

    The rule sees a copy of the population holding those curves (so it cannot touch the real
    one) and the same outcome; it returns the next ``(mu, sigma)``.
    """
    import dataclasses

    view = dataclasses.replace(
        state, population=dataclasses.replace(state.population, mu=mu, sigma=sigma)
    )
    new_mu, new_sigma = rule.apply(view, outcome, rng)
    return np.asarray(new_mu, dtype=float), np.asarray(new_sigma, dtype=float)


def combine(rules: Iterable, *, eta: float = 1.0, noise: float = 0.0, dt: float = 1.0) -> DriftSum:
    """Sum force rules into one drift rule.

    Parameters
    ----------
    rules : iterable of force rules or registered drift names
        A name (``"anchor"``) is built with its default parameters through the registry.
    eta, noise, dt : float
        Friction, diffusion coefficient and time step of the summed dynamics (see
        :class:`DriftSum`).

    Returns
    -------
    DriftSum
        A :class:`~propensim.plugins.contracts.DriftRule` (already checked).

    Examples
    --------
    >>> drift = combine([AnchorDrift(strength=2.0), OutcomeDrift(step=0.1)], noise=0.5)
    >>> type(drift).__name__
    'DriftSum'
    """
    from propensim.plugins.registry import make_plugin

    built = tuple(make_plugin("drift", r) if isinstance(r, str) else r for r in rules)
    out = DriftSum(rules=built, eta=eta, noise=noise, dt=dt)
    out.check()
    return out
