"""The quadratic response surface (Box & Wilson 1951), least squares by QR, PRESS leave-one-out (Allen 1974)."""

from __future__ import annotations

import math

import numpy as np
from scipy.linalg import solve_triangular
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.utils.validation import check_is_fitted

from sortie.models._common import (
    _LEVERAGE_TOL,
    _check_X,
    _check_Xy,
    _plural,
)

# --------------------------------------------------------------------------- quadratic response surface


def _quadratic_powers(n_dims: int) -> np.ndarray:
    """Exponents of the full quadratic model: intercept, linear, squares, two-factor products."""
    eye = np.eye(n_dims, dtype=int)
    rows = [np.zeros(n_dims, dtype=int), *eye, *(2 * eye)]
    rows += [eye[i] + eye[j] for i in range(n_dims) for j in range(i + 1, n_dims)]
    return np.array(rows, dtype=int).reshape(-1, n_dims)


class QuadraticSurface(RegressorMixin, BaseEstimator):
    """Full second-order polynomial response surface, fitted by least squares.

    ``y ~ b0 + sum_i b_i z_i + sum_i b_ii z_i^2 + sum_{i<j} b_ij z_i z_j`` in coded units
    ``z = 2 x - 1`` (centre of the cube at 0, faces at +-1), the model of Box & Wilson (1951).
    Coding keeps the columns of the model matrix of similar size and nearly orthogonal on a
    symmetric design, so the least-squares problem is well conditioned; it is solved by a thin QR
    factorisation, which also gives the hat-matrix diagonal for PRESS (Allen 1974) without forming
    an inverse.

    It needs at least ``p = (k + 1)(k + 2) / 2`` designs for ``k`` parameters, and designs that
    vary every parameter at three or more levels (a central composite design does).

    Attributes
    ----------
    coef_ : ndarray of shape (n_terms,)
        Coefficients in coded units, one per row of ``powers_``.
    powers_ : ndarray of shape (n_terms, n_dims)
        Exponents of each term: ``coef_[j]`` multiplies ``prod_i z_i ** powers_[j, i]``. Order:
        intercept, linear terms, squares, two-factor products (i < j).
    X_ : ndarray of shape (n_points, n_dims)
    y_ : ndarray of shape (n_points,)
    leverage_ : ndarray of shape (n_points,)
        Hat-matrix diagonal ``h_ii``.
    residual_variance_ : float
        ``s^2 = SSE / (n - p)``; NaN when ``n == p``.
    press_ : float
        ``sum_i (e_i / (1 - h_ii))^2``; NaN when some ``h_ii == 1`` (always so when ``n == p``).
    R_ : ndarray of shape (n_terms, n_terms)
        Upper-triangular factor of the model matrix.
    warnings_ : list of str
        Fit-time warnings (no residual degrees of freedom, points with leverage 1).

    References
    ----------
    .. [1] G. E. P. Box and K. B. Wilson, "On the experimental attainment of optimum conditions",
       J. R. Stat. Soc. B 13(1):1-45, 1951.
    .. [2] D. M. Allen, "The relationship between variable selection and data augmentation and a
       method for prediction", Technometrics 16(1):125-127, 1974.
    .. [3] R. H. Myers and D. C. Montgomery, *Response Surface Methodology*, 2nd ed., Wiley, 2002.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.random.default_rng(0).random((12, 2))
    >>> rs = QuadraticSurface().fit(X, 1 + X[:, 0] ** 2 - X[:, 0] * X[:, 1])
    >>> bool(rs.press_ < 1e-20)
    True
    """

    name = "quadratic"
    has_std = True

    def __init__(self) -> None:
        pass

    @staticmethod
    def _features(X: np.ndarray, powers: np.ndarray) -> np.ndarray:
        z = 2.0 * X - 1.0
        return np.prod(z[:, None, :] ** powers[None, :, :], axis=2)

    def fit(self, X: np.ndarray, y: np.ndarray) -> QuadraticSurface:
        """Fit by least squares.

        Parameters
        ----------
        X : array-like of shape (n_points, n_dims)
            Designs in the unit cube; ``n_points >= (n_dims + 1)(n_dims + 2) / 2``.
        y : array-like of shape (n_points,)

        Returns
        -------
        self : QuadraticSurface

        Raises
        ------
        ValueError
            Too few designs, a design that cannot determine every term, or invalid inputs.
        """
        X, y = _check_Xy(X, y)
        n, k = X.shape
        powers = _quadratic_powers(k)
        p = powers.shape[0]
        if n < p:
            raise ValueError(f"A quadratic response surface needs at least {p} designs for {_plural(k, 'parameter')}, got {n}.")
        F = self._features(X, powers)
        rank = np.linalg.matrix_rank(F)
        if rank < p:
            raise ValueError(
                f"The designs determine only {rank} of the {p} quadratic terms; "
                "vary every parameter at three or more levels (a central composite design does)."
            )
        Q, R = np.linalg.qr(F, mode="reduced")
        self.warnings_: list[str] = []
        self.powers_, self.R_ = powers, R
        self.coef_ = solve_triangular(R, Q.T @ y)
        self.X_, self.y_ = X, y
        # Hat matrix H = Q Q^T, so h_ii is the squared norm of row i of Q (Allen 1974).
        self.leverage_ = np.einsum("ij,ij->i", Q, Q)
        self._residuals = y - F @ self.coef_
        dof = n - p
        if dof > 0:
            self.residual_variance_ = float(self._residuals @ self._residuals / dof)
        else:
            self.residual_variance_ = math.nan
            self.warnings_.append(
                f"NoResidualDOF: {n} designs for {p} terms leave no residual degrees of freedom; the surface interpolates, "
                "its standard error is reported as 0 and PRESS is undefined."
            )
        with np.errstate(divide="ignore", invalid="ignore"):
            loo = self._residuals / (1.0 - self.leverage_)
        stuck = 1.0 - self.leverage_ <= _LEVERAGE_TOL
        loo[stuck] = np.nan
        if stuck.any() and dof > 0:
            self.warnings_.append(
                f"FullLeverage: rows {np.flatnonzero(stuck)[:10].tolist()} alone determine a term, so their "
                "leave-one-out residuals are undefined."
            )
        self._loo = loo
        self.press_ = float(loo @ loo)
        return self

    def predict(self, X: np.ndarray, return_std: bool = False) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Fitted surface, and optionally its standard error.

        Parameters
        ----------
        X : array-like of shape (n_points, n_dims)
        return_std : bool, default=False
            Also return the standard error of the fitted mean, ``sqrt(s^2 f(x) (F^T F)^-1 f(x)^T)``
            (Myers & Montgomery 2002). Like the GP's latent std, it excludes the scatter of a new
            observation about the surface. It is all zeros when ``n == p`` (no residual variance).

        Returns
        -------
        mean : ndarray of shape (n_points,)
        std : ndarray of shape (n_points,)
            Only returned when ``return_std`` is True.
        """
        check_is_fitted(self, "coef_")
        X = _check_X(X, n_dims=self.X_.shape[1])
        F = self._features(X, self.powers_)
        mean = F @ self.coef_
        if not return_std:
            return mean
        if not np.isfinite(self.residual_variance_):
            return mean, np.zeros(X.shape[0])
        # f (F^T F)^-1 f^T = ||R^-T f^T||^2 with F = QR.
        w = solve_triangular(self.R_, F.T, trans="T")
        return mean, np.sqrt(self.residual_variance_ * np.einsum("ij,ij->j", w, w))

    def loo_residuals(self) -> np.ndarray:
        """PRESS residuals ``e_i / (1 - h_ii)``, shape (n_points,).

        These equal ``y_i - yhat_(i)`` from refitting without point ``i`` exactly, not
        approximately (Allen 1974). NaN where ``h_ii == 1``: the point alone determines a term.
        """
        check_is_fitted(self, "coef_")
        return self._loo.copy()

