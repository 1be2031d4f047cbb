"""What a trader is: propensity curves, entropic forces, oscillator levels, the population.

This layer imports no other propensim layer. Names load on first use, so importing it is cheap.
"""

from propensim.agents._lazy import lazy_exports

_NAMES = {
    "Curve": "curves",
    "NormalCurve": "curves",
    "OscillatorCurve": "curves",
    "LogisticCurve": "curves",
    "TabulatedCurve": "curves",
    "JointCurve": "joint_curve",
    "joint": "joint_curve",
    "grid_joint": "joint_curve",
    "hermite_functions": "oscillator",
    "log_hermite_functions": "oscillator",
    "oscillator_density": "oscillator",
    "level_energies": "oscillator",
    "oscillator_mass": "oscillator",
    "boltzmann_weights": "oscillator",
    "thermal_variance": "oscillator",
    "Population": "population",
    "build_population": "population",
    "BUYER": "population",
    "SELLER": "population",
}

__all__ = sorted(_NAMES)

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)
