"""Published test functions with known optima, for checking searches.

Each function comes with its usual domain as a :class:`~warmstart.space.Space`
and its known global minimum. Constants, domains and optima are the published
ones as listed by the Virtual Library of Simulation Experiments (Surjanovic &
Bingham) and the original papers named beside each; they are written here
from memory and checked by the tests where an outside reference exists
(``scipy.optimize.rosen``).

All functions are to be *minimised* (``maximize=False`` in a search).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Mapping

import numpy as np

from warmstart.space import Space

__all__ = [
    "BenchmarkFunction",
    "benchmark_functions",
    "branin",
    "hartmann6",
    "rastrigin",
    "rosenbrock",
]


@dataclass(frozen=True)
class BenchmarkFunction:
    """A test function over a space, with its known minimum.

    Attributes
    ----------
    name : str
        Short name, e.g. ``"branin"``.
    space : Space
        Domain (all parameters ``real``).
    minimum : float
        Known global minimum value.
    minimizers : tuple of dict
        Known global minimisers as configs.
    source : str
        Where the definition and optimum are published.
    function : callable
        Vectorised form: an (n, d) array of parameter values (in the order
        of ``space.names``) to an (n,) array of values.
    """

    name: str
    space: Space
    minimum: float
    minimizers: tuple
    source: str
    function: Callable[[np.ndarray], np.ndarray] = field(repr=False)

    def __call__(self, config: Mapping) -> float:
        """Value at one config (a dict of parameter values)."""
        x = np.array([[config[name] for name in self.space.names]], dtype=float)
        return float(self.function(x)[0])

    def evaluate(self, X: np.ndarray) -> np.ndarray:
        """Values at the rows of an (n, d) array of parameter values."""
        return self.function(np.atleast_2d(np.asarray(X, dtype=float)))


def _box(names: list[str], low: float, high: float) -> Space:
    return Space.from_dict({"params": {n: {"type": "real", "low": low, "high": high} for n in names}})


def _branin(X: np.ndarray) -> np.ndarray:
    x1, x2 = X[:, 0], X[:, 1]
    b = 5.1 / (4 * np.pi**2)
    c = 5 / np.pi
    t = 1 / (8 * np.pi)
    return (x2 - b * x1**2 + c * x1 - 6) ** 2 + 10 * (1 - t) * np.cos(x1) + 10


def branin() -> BenchmarkFunction:
    """Branin–Hoo function on [-5, 10] x [0, 15]; minimum 0.397887 at three points.

    Source: Dixon & Szegő (1978), "The global optimisation problem: an
    introduction"; Virtual Library of Simulation Experiments (from memory).
    """
    space = Space.from_dict({"params": {"x1": {"type": "real", "low": -5.0, "high": 10.0},
                                        "x2": {"type": "real", "low": 0.0, "high": 15.0}}})
    minimizers = ({"x1": -np.pi, "x2": 12.275}, {"x1": np.pi, "x2": 2.275},
                  {"x1": 9.42478, "x2": 2.475})
    return BenchmarkFunction("branin", space, 0.397887, minimizers,
                             "Dixon & Szego 1978; Virtual Library of Simulation Experiments",
                             _branin)


_H6_ALPHA = np.array([1.0, 1.2, 3.0, 3.2])
_H6_A = np.array([
    [10, 3, 17, 3.5, 1.7, 8],
    [0.05, 10, 17, 0.1, 8, 14],
    [3, 3.5, 1.7, 10, 17, 8],
    [17, 8, 0.05, 10, 0.1, 14],
])
_H6_P = 1e-4 * np.array([
    [1312, 1696, 5569, 124, 8283, 5886],
    [2329, 4135, 8307, 3736, 1004, 9991],
    [2348, 1451, 3522, 2883, 3047, 6650],
    [4047, 8828, 8732, 5743, 1091, 381],
])


def _hartmann6(X: np.ndarray) -> np.ndarray:
    inner = ((X[:, None, :] - _H6_P[None]) ** 2 * _H6_A[None]).sum(axis=2)
    return -(np.exp(-inner) @ _H6_ALPHA)


def hartmann6() -> BenchmarkFunction:
    """Hartmann 6-dimensional function on [0, 1]^6; minimum -3.32237.

    Source: Hartman (1973); Dixon & Szegő (1978); Virtual Library of
    Simulation Experiments (constants and optimum from memory).
    """
    names = [f"x{i}" for i in range(1, 7)]
    xmin = (0.20169, 0.150011, 0.476874, 0.275332, 0.311652, 0.6573)
    return BenchmarkFunction("hartmann6", _box(names, 0.0, 1.0), -3.32237,
                             (dict(zip(names, xmin)),),
                             "Hartman 1973; Dixon & Szego 1978; Virtual Library of Simulation "
                             "Experiments", _hartmann6)


def _rastrigin(X: np.ndarray) -> np.ndarray:
    return 10 * X.shape[1] + (X**2 - 10 * np.cos(2 * np.pi * X)).sum(axis=1)


def rastrigin(dim: int = 4) -> BenchmarkFunction:
    """Rastrigin function on [-5.12, 5.12]^dim; minimum 0 at the origin.

    Source: Rastrigin (1974); Virtual Library of Simulation Experiments
    (from memory).
    """
    names = [f"x{i}" for i in range(1, dim + 1)]
    return BenchmarkFunction(f"rastrigin{dim}", _box(names, -5.12, 5.12), 0.0,
                             ({n: 0.0 for n in names},),
                             "Rastrigin 1974; Virtual Library of Simulation Experiments",
                             _rastrigin)


def _rosenbrock(X: np.ndarray) -> np.ndarray:
    return (100.0 * (X[:, 1:] - X[:, :-1] ** 2) ** 2 + (1.0 - X[:, :-1]) ** 2).sum(axis=1)


def rosenbrock(dim: int = 4) -> BenchmarkFunction:
    """Rosenbrock function on [-5, 10]^dim; minimum 0 at (1, ..., 1).

    Source: Rosenbrock (1960); Virtual Library of Simulation Experiments
    (domain from memory); same formula as ``scipy.optimize.rosen``.
    """
    names = [f"x{i}" for i in range(1, dim + 1)]
    return BenchmarkFunction(f"rosenbrock{dim}", _box(names, -5.0, 10.0), 0.0,
                             ({n: 1.0 for n in names},),
                             "Rosenbrock 1960; Virtual Library of Simulation Experiments",
                             _rosenbrock)


def benchmark_functions() -> list[BenchmarkFunction]:
    """The four published functions in their default sizes
    (Branin, Hartmann-6, Rastrigin in 4-d, Rosenbrock in 4-d)."""
    return [branin(), hartmann6(), rastrigin(4), rosenbrock(4)]
