"""The one Gaussian-process regression model of warmstart: its inputs and its kernel.

Two parts of warmstart fit a Gaussian process (scikit-learn's
:class:`~sklearn.gaussian_process.GaussianProcessRegressor`) to encoded
configs: the GP-EI baseline search (:class:`warmstart.search.baselines.GPSearch`)
and the replay surrogate (:class:`warmstart.gain.objectives.SurrogateObjective`).
Both take their inputs from :func:`gp_features` and their model from
:func:`fit_gp` with a :class:`KernelSettings`:

* inputs: ``real``/``integer`` coordinates keep their unit-cube value, a
  ``choice`` becomes one indicator column per level (levels have no order),
  an inactive coordinate is 0 with an "active" indicator beside it where
  asked;
* kernel: ``constant * Matern(nu=5/2, one length scale per input) + white
  noise``, hyperparameters fitted by maximum likelihood, targets normalised.

The two users differ only in the kernel's starting values and bounds, set
in :data:`SEARCH_KERNEL` and :data:`SURROGATE_KERNEL` (the search fits the
raw scores of deterministic objectives, so it expects almost no noise; the
surrogate fits normal scores of cross-validated results, which are noisy).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from sklearn.exceptions import ConvergenceWarning
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Kernel, Matern, WhiteKernel

from warmstart.space import Space

__all__ = ["gp_features", "conditional_columns", "KernelSettings", "SEARCH_KERNEL", "SURROGATE_KERNEL", "fit_gp"]


def gp_features(space: Space, rows: np.ndarray, conditional: np.ndarray | None = None) -> np.ndarray:
    """Regressor inputs for encoded rows.

    ``real``/``integer`` coordinates keep their unit-cube value; a ``choice``
    becomes one indicator column per level (all zero when inactive); an
    inactive ``real``/``integer`` coordinate is 0 and, for the columns
    flagged in ``conditional``, an extra indicator says whether the
    parameter was active.

    Parameters
    ----------
    space : Space
    rows : ndarray (n, d)
        Encoded rows (NaN = inactive).
    conditional : ndarray (d,) of bool, optional
        Coordinates that get an "active" indicator (none by default).

    Returns
    -------
    ndarray (n, k)
        ``k`` = the number of real/integer coordinates, plus the levels of
        every choice, plus the flagged coordinates.
    """
    rows = np.atleast_2d(np.asarray(rows, dtype=float))
    if conditional is None:
        conditional = np.zeros(space.dim, dtype=bool)
    cols = []
    for j, p in enumerate(space.params):
        x = rows[:, j]
        if p.kind == "choice":
            for level in range(p.n_levels):
                cols.append((x == level).astype(float))
        else:
            cols.append(np.nan_to_num(x, nan=0.0))
            if conditional[j]:
                cols.append(np.isfinite(x).astype(float))
    return np.column_stack(cols)


def conditional_columns(space: Space) -> np.ndarray:
    """Coordinates of parameters that have a condition (may be inactive), (d,) of bool."""
    return np.array([bool(p.when) for p in space.params], dtype=bool)


@dataclass(frozen=True)
class KernelSettings:
    """Starting values and bounds of the kernel ``constant * Matern 5/2 + white``.

    Attributes
    ----------
    length_scale : float
        Starting length scale of every input (unit-cube units).
    length_scale_bounds : (float, float)
    amplitude_bounds : (float, float)
        Bounds of the constant factor (starts at 1; targets are normalised).
    noise : float
        Starting noise level of the white kernel.
    noise_bounds : (float, float)
    """

    length_scale: float
    length_scale_bounds: tuple[float, float]
    amplitude_bounds: tuple[float, float]
    noise: float
    noise_bounds: tuple[float, float]

    def kernel(self, n_features: int) -> Kernel:
        """The kernel over ``n_features`` inputs, one length scale each."""
        return (ConstantKernel(1.0, self.amplitude_bounds)
                * Matern(length_scale=np.full(n_features, self.length_scale),
                         length_scale_bounds=self.length_scale_bounds, nu=2.5)
                + WhiteKernel(self.noise, self.noise_bounds))


#: GP-EI search: deterministic objectives, so the noise may fall to almost nothing.
SEARCH_KERNEL = KernelSettings(length_scale=0.5, length_scale_bounds=(1e-2, 1e2), amplitude_bounds=(1e-3, 1e3),
                               noise=1e-4, noise_bounds=(1e-8, 1e-1))
#: Replay surrogate: cross-validated scores carry noise of a tenth of their spread or so.
SURROGATE_KERNEL = KernelSettings(length_scale=0.3, length_scale_bounds=(1e-2, 1e2), amplitude_bounds=(1e-2, 1e2),
                                  noise=0.1, noise_bounds=(1e-5, 1.0))


def fit_gp(features: np.ndarray, y: np.ndarray, settings: KernelSettings, n_restarts: int = 0,
           random_state: int | None = None) -> GaussianProcessRegressor:
    """Fit the Gaussian process to ``(features, y)``.

    Parameters
    ----------
    features : ndarray (n, k)
        From :func:`gp_features`.
    y : ndarray (n,)
        Targets (normalised inside the regressor).
    settings : KernelSettings
    n_restarts : int, default 0
        Restarts of the hyperparameter optimiser from random starting values.
    random_state : int, optional
        Seeds those restarts.

    Returns
    -------
    GaussianProcessRegressor
        Fitted. A hyperparameter at its bound is a fit, not a failure, so
        scikit-learn's ConvergenceWarning is silenced.
    """
    gp = GaussianProcessRegressor(settings.kernel(features.shape[1]), normalize_y=True,
                                  n_restarts_optimizer=n_restarts, random_state=random_state)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        gp.fit(features, y)
    return gp
