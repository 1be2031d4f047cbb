"""What a trader is: propensity curves, entropic forces, oscillator levels, the population.

This layer imports no other propensim layer. Names load on first use, so importing it is cheap.
"""

from importlib import import_module

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
    "Trader": "population",
    "BUYER": "population",
    "SELLER": "population",
}

__all__ = sorted(_NAMES)


def __getattr__(name: str):
    if name in _NAMES:
        return getattr(import_module(f"{__name__}.{_NAMES[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return __all__
