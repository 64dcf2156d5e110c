"""The polyharmonic radial-basis-function surrogate, with Rippa's (1999) closed-form leave-one-out."""

from __future__ import annotations

import numbers
import warnings

import numpy as np
from scipy.interpolate import RBFInterpolator
from scipy.linalg import LinAlgWarning, lu_factor, lu_solve
from scipy.spatial.distance import cdist
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.utils.validation import check_is_fitted

from sortie.models._common import (
    _RBF_KERNELS,
    _check_X,
    _check_Xy,
    _plural,
)

# --------------------------------------------------------------------------- radial basis functions


class RadialBasisSurrogate(RegressorMixin, BaseEstimator):
    """Polyharmonic radial-basis-function interpolant with a linear polynomial tail.

    ``s(x) = sum_j c_j phi(||x - x_j||) + b_0 + sum_i b_i x_i`` with ``sum_j c_j p(x_j) = 0`` for
    each linear monomial ``p``, fitted with ``scipy.interpolate.RBFInterpolator`` (``degree=1``).
    The kernels offered have no shape parameter, so there is nothing to tune and the model is
    reproducible and fast; this makes it a useful fallback when a GP's likelihood is flat. It
    interpolates the data when ``smoothing == 0``.

    Parameters
    ----------
    kernel : {"thin_plate_spline", "cubic", "linear"}, default="thin_plate_spline"
        ``r^2 log r``, ``r^3`` or ``-r``. Kernels that need a shape parameter or a quadratic tail are
        not offered, because Rippa's leave-one-out below assumes this exact system.
    smoothing : float, default=0.0
        Added to the kernel diagonal; > 0 trades interpolation for a smoother fit (needed when
        designs repeat).

    Attributes
    ----------
    model_ : scipy.interpolate.RBFInterpolator
    X_ : ndarray of shape (n_points, n_dims)
    y_ : ndarray of shape (n_points,)
    warnings_ : list of str
        Always empty; present so that all surrogates can be logged alike.

    Notes
    -----
    There is no statistical model behind an RBF interpolant, so there is no standard error:
    ``predict(X, return_std=True)`` returns a std of NaN, and ``has_std`` is False so that infill
    code can refuse this model for expected improvement.

    References
    ----------
    .. [1] S. Rippa, "An algorithm for selecting a good value for the parameter c in radial basis
       function interpolation", Adv. Comput. Math. 11:193-210, 1999.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.random.default_rng(0).random((20, 2))
    >>> rbf = RadialBasisSurrogate().fit(X, X.sum(axis=1))
    >>> bool(np.allclose(rbf.predict(X), X.sum(axis=1)))
    True
    """

    name = "rbf"
    has_std = False

    def __init__(self, *, kernel: str = "thin_plate_spline", smoothing: float = 0.0) -> None:
        self.kernel = kernel
        self.smoothing = smoothing

    def _check_params(self) -> None:
        if self.kernel not in _RBF_KERNELS:
            raise ValueError(f"kernel must be one of {sorted(_RBF_KERNELS)}, got {self.kernel!r}.")
        if isinstance(self.smoothing, bool) or not isinstance(self.smoothing, numbers.Real) or not self.smoothing >= 0:
            raise ValueError(f"smoothing must be a non-negative number, got {self.smoothing!r}.")

    def fit(self, X: np.ndarray, y: np.ndarray) -> RadialBasisSurrogate:
        """Solve the interpolation system.

        Parameters
        ----------
        X : array-like of shape (n_points, n_dims)
            Distinct designs in the unit cube (unless ``smoothing > 0``); ``n_points >= n_dims + 1``
            and not all on one hyperplane.
        y : array-like of shape (n_points,)

        Returns
        -------
        self : RadialBasisSurrogate

        Raises
        ------
        ValueError
            Too few designs, a singular system (duplicates, or designs on one hyperplane), or
            invalid inputs.
        """
        self._check_params()
        X, y = _check_Xy(X, y)
        n, k = X.shape
        if n < k + 1:
            raise ValueError(f"A radial basis surrogate needs at least {k + 1} designs for {_plural(k, 'parameter')}, got {n}.")
        try:
            self.model_ = RBFInterpolator(X, y, kernel=self.kernel, smoothing=float(self.smoothing), degree=1)
        except np.linalg.LinAlgError:
            raise ValueError(
                "The radial basis system is singular; remove duplicate designs, add designs off the common "
                "hyperplane, or set smoothing > 0."
            ) from None
        self.X_, self.y_ = X, y
        self.warnings_: list[str] = []
        return self

    def predict(self, X: np.ndarray, return_std: bool = False) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Interpolated values, and a NaN std when asked (an RBF has no standard error).

        Parameters
        ----------
        X : array-like of shape (n_points, n_dims)
        return_std : bool, default=False

        Returns
        -------
        mean : ndarray of shape (n_points,)
        std : ndarray of shape (n_points,)
            All NaN. Only returned when ``return_std`` is True.
        """
        check_is_fitted(self, "model_")
        X = _check_X(X, n_dims=self.X_.shape[1])
        mean = self.model_(X)
        if return_std:
            return mean, np.full(X.shape[0], np.nan)
        return mean

    def loo_residuals(self) -> np.ndarray:
        """Leave-one-out residuals by Rippa's formula, shape (n_points,).

        With the saddle-point matrix ``M = [[K + lambda I, P], [P^T, 0]]`` and coefficients
        ``c = M^-1 [y; 0]``, the residual of the interpolant built without point ``i`` is
        ``e_i = c_i / (M^-1)_ii`` (Rippa 1999). ``M`` is rebuilt here from ``cdist`` and the kernel
        formula because scipy does not expose it; one LU factorisation replaces n refits.

        Raises
        ------
        ValueError
            With fewer than ``n_dims + 2`` designs (a design left out would leave the linear tail
            undetermined).
        """
        check_is_fitted(self, "model_")
        n, k = self.X_.shape
        if n < k + 2:
            raise ValueError(f"Leave-one-out for a radial basis surrogate needs at least {k + 2} designs, got {n}.")
        K = _RBF_KERNELS[self.kernel](cdist(self.X_, self.X_))
        K[np.diag_indices(n)] += float(self.smoothing)
        # Linear tail in coded units; any basis of the same polynomial space gives the same LOO.
        P = np.hstack([np.ones((n, 1)), 2.0 * self.X_ - 1.0])
        M = np.block([[K, P], [P.T, np.zeros((k + 1, k + 1))]])
        with warnings.catch_warnings():
            # An exactly singular M (a parameter that never varies among these designs) is an
            # answer, not noise for the user's terminal: the candidate is skipped with this reason.
            warnings.simplefilter("error", LinAlgWarning)
            try:
                lu = lu_factor(M, check_finite=False)
            except LinAlgWarning:
                raise ValueError("The radial basis leave-one-out system is singular (a parameter takes one value "
                                 "in every design, or the designs lie on a hyperplane).") from None
        M_inv = lu_solve(lu, np.eye(n + k + 1), check_finite=False)
        coef = M_inv[:n, :n] @ self.y_
        with np.errstate(divide="ignore", invalid="ignore"):
            return coef / np.diag(M_inv)[:n]

