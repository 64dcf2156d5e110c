"""The Gaussian-process surrogate (Kriging): Matérn-5/2 ARD kernel, MAP hyper-parameters with a hand-written
gradient, closed-form leave-one-out, Kriging-believer conditioning.

See :mod:`sortie.models` for the references.
"""

from __future__ import annotations

import copy
import math
import numbers
import warnings

import numpy as np
from scipy.linalg import cho_solve, cholesky
from scipy.linalg.lapack import dpotri, dtrtrs
from scipy.optimize import minimize
from scipy.spatial.distance import cdist
from sklearn.base import BaseEstimator, RegressorMixin, clone
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Kernel, Matern, Product, Sum, WhiteKernel
from sklearn.utils.validation import check_is_fitted
from threadpoolctl import threadpool_limits

from sortie.models._common import (
    _ALPHA_MAX,
    _ALPHA_WITH_NOISE,
    _ALPHA_WITHOUT_NOISE,
    _AMPLITUDE_BOUNDS,
    _LENGTH_SCALE_PRIOR,
    _PREDICT_CHUNK,
    _STD_FLOOR,
    _check_X,
    _check_Xy,
    _record,
)

# --------------------------------------------------------------------------- Gaussian process

_SQRT5 = math.sqrt(5.0)
_LOG_2PI = math.log(2.0 * math.pi)
# Value returned where the kernel matrix is not positive definite: finite, so L-BFGS-B backs off.
_WALL = 1e25


def _neg_log_posterior(
    theta: np.ndarray, X: np.ndarray, y: np.ndarray, alpha: float, noise: bool, prior: tuple[float, float] | None
) -> tuple[float, np.ndarray]:
    """Negative log marginal likelihood (minus a log-normal length-scale prior) and its gradient.

    The kernel is ``C * Matern52(length_scale) [+ WhiteKernel(noise)] + alpha I`` and ``theta`` is
    scikit-learn's log-parameter vector for it, ``[log C, log l_1..l_d, (log noise)]``. The value is
    Rasmussen & Williams (2006) eq. 5.8 and the gradient eq. 5.9, ``0.5 tr((a a^T - K^-1) dK/dtheta)``.
    scikit-learn builds ``dK/dtheta`` as an ``n x n x (d + 2)`` array and contracts it with an
    einsum, which dominates a fit. For the Matern-5/2 length-scales the trace reduces to two
    matrix products (measured on one core, d = 10: 1.2 ms against scikit-learn's 11 ms at
    n = 150, 13.5 ms against 104 ms at n = 500):

        dK_ij/dlog l_k = C (5/3) (1 + sqrt5 r_ij) exp(-sqrt5 r_ij) (x_ik - x_jk)^2 / l_k^2

        0.5 sum_ij A_ij (u_ik - u_jk)^2 = sum_i u_ik^2 (A 1)_i - sum_i u_ik (A u)_ik,   u = x / l,

    with ``A = (a a^T - K^-1) * C (5/3) (1 + sqrt5 r) exp(-sqrt5 r)`` (A symmetric), so an
    evaluation costs one Cholesky factorisation, one inverse from it and O(n^2 d) products.

    Returns ``(inf-like value, zero gradient)`` when K is not positive definite, so L-BFGS-B backs
    off instead of failing.
    """
    n, d = X.shape
    C = math.exp(theta[0])
    scales = np.exp(theta[1 : 1 + d])
    nugget = (math.exp(theta[1 + d]) if noise else 0.0) + alpha
    U = X / scales
    sq = cdist(U, U, "sqeuclidean")
    r = np.sqrt(sq)
    e = np.exp(-_SQRT5 * r)
    K_signal = C * (1.0 + _SQRT5 * r + (5.0 / 3.0) * sq) * e
    K = K_signal.copy()
    K[np.diag_indices(n)] += nugget
    try:
        L = cholesky(K, lower=True, check_finite=False)
    except np.linalg.LinAlgError:
        return _WALL, np.zeros_like(theta)
    a = cho_solve((L, True), y, check_finite=False)
    value = 0.5 * float(y @ a) + float(np.log(np.diag(L)).sum()) + 0.5 * n * _LOG_2PI
    K_inv, info = dpotri(L, lower=1)
    if info != 0:
        return _WALL, np.zeros_like(theta)
    K_inv += K_inv.T  # dpotri fills the lower triangle; the upper one is still L's zeros
    K_inv[np.diag_indices(n)] *= 0.5
    W = np.outer(a, a) - K_inv
    lml_grad = np.empty_like(theta)  # gradient of the log marginal likelihood
    lml_grad[0] = 0.5 * float(np.sum(W * K_signal))
    A = W * (C * (5.0 / 3.0) * (1.0 + _SQRT5 * r) * e)
    lml_grad[1 : 1 + d] = (U * U * A.sum(axis=1)[:, None]).sum(axis=0) - (U * (A @ U)).sum(axis=0)
    if noise:
        lml_grad[1 + d] = 0.5 * (nugget - alpha) * float(np.trace(W))
    grad = -lml_grad
    if prior is not None:
        centre, spread = prior
        z = (theta[1 : 1 + d] - centre) / spread
        value += 0.5 * float(z @ z)
        grad[1 : 1 + d] += z / spread
    return value, grad




class GaussianProcessSurrogate(RegressorMixin, BaseEstimator):
    """Kriging model: a Gaussian process with an anisotropic Matern-5/2 kernel.

    The kernel is ``ConstantKernel * Matern(nu=2.5, one length-scale per column)``, plus a fitted
    ``WhiteKernel`` when ``noise`` is True. Matern-5/2 is twice differentiable, which suits
    smooth flow quantities better than the infinitely smooth squared exponential, and one
    length-scale per column (ARD) lets inactive parameters drift to long length-scales, so the
    fitted length-scales double as a sensitivity screen. Hyper-parameters are fitted by maximum a
    posteriori (the likelihood times a weak prior on the length-scales) on at most
    ``max_fit_points`` designs, with this module's own likelihood gradient (see :meth:`_search`);
    the model is then conditioned on every design with scikit-learn's ``GaussianProcessRegressor``.

    ``y`` is normalised here (subtract the mean, divide by the std) and scikit-learn is run with
    ``normalize_y=False``. Keeping the normalisation fixed is what makes the Kriging-believer refit
    in :meth:`believer` exact: re-normalising with the fantasised values included would rescale
    the variance (gp.md section 2).

    Parameters
    ----------
    n_restarts : int, default=2
        Extra optimiser starts, length-scales drawn from the prior (uniformly in log space without
        one), after the start at the initial kernel. A likelihood with several local optima is
        common for small n.
    noise : bool, default=True
        Add a fitted ``WhiteKernel`` (noise level bounded to [1e-10, 1e-2] on the normalised
        scale). Keep it for solvers with iterative convergence noise or repeated designs; for
        strictly deterministic solvers set False, and a small fixed jitter is used instead.
    length_scale_bounds : tuple of float, default=(1e-2, 1e2)
        Bounds on each length-scale in unit-cube coordinates. Below 1e-2 no realistic design can
        resolve the variation; above ~10 the input is effectively inactive.
    length_scale_prior : (float, float) or None, default=(1.0, 1.5)
        ``(median, log_std)`` of a log-normal prior on each length-scale, the median multiplied by
        sqrt(n_dims). Broad on purpose (a factor 4.5 per standard deviation): it only decides
        what few designs cannot, such as six Branin designs whose likelihood called an active
        input inactive. None fits by maximum likelihood.
    max_fit_points : int or None, default=150
        At most this many designs, drawn at random, enter the hyper-parameter search (each
        likelihood evaluation costs O(n^3)); the model is still conditioned on all of them. None
        uses every design.
    max_iter : int, default=200
        L-BFGS-B iteration limit per start of the hyper-parameter search.
    random_state : int, RandomState or None, default=None
        Seeds the optimiser restarts and the subset; the same value gives the same fit.
    warm_kernel : Kernel or None, default=None
        A previous fit's ``kernel_`` to start the optimiser from (with ``n_restarts=0`` a refit
        after one more design then costs a few likelihood evaluations instead of a search). It
        must be this class's kernel (constant x Matern-5/2 [+ white noise]).
        Ignored when its number of hyper-parameters does not match the data.
    optimize : bool, default=True
        Fit the hyper-parameters by maximum likelihood. False keeps the (warm) kernel as given,
        so a refit is one Cholesky factorisation: cheap refits between full searches (gp.md §1).

    Attributes
    ----------
    model_ : sklearn.gaussian_process.GaussianProcessRegressor
        The fitted regressor, on the normalised y scale.
    kernel_ : sklearn.gaussian_process.kernels.Kernel
        The fitted kernel (including the ``WhiteKernel`` term when ``noise`` is True).
    X_ : ndarray of shape (n_points, n_dims)
        Training inputs.
    y_ : ndarray of shape (n_points,)
        Training targets in original units (with fantasised values appended for a believer model).
    y_mean_ : float
        Mean subtracted from y before fitting.
    y_std_ : float
        Scale y was divided by: the std of y, or, when y is constant, ``1e-6 * max(1, |y|)`` so that
        the predicted std is negligible.
    alpha_ : float
        Diagonal jitter (normalised scale) that the final Cholesky factorisation needed.
    n_pending_ : int
        Number of trailing rows of ``X_``/``y_`` that are not solver results (Kriging-believer
        fantasies or imputed failures, see :meth:`condition`); 0 after ``fit``.
    warnings_ : list of str
        Warnings raised while fitting, as ``"Category: message"``, kept instead of printed.

    Notes
    -----
    When ``np.ptp(y) == 0`` (every run hit the same cap, say) the likelihood has no information
    on the kernel. The initial kernel is then used without optimisation, the model predicts the
    constant with a negligible std, and ``warnings_`` says so: expected improvement is ~0
    everywhere, and the caller should fall back to space-filling.

    References
    ----------
    .. [1] D. R. Jones, M. Schonlau and W. J. Welch, "Efficient global optimization of expensive
       black-box functions", J. Global Optim. 13(4):455-492, 1998.
    .. [2] C. E. Rasmussen and C. K. I. Williams, *Gaussian Processes for Machine Learning*,
       MIT Press, 2006.
    .. [3] D. Ginsbourger, R. Le Riche and L. Carraro, "Kriging is well-suited to parallelize
       optimization", Springer ALO 2:131-162, 2010.
    .. [4] C. Hvarfner, E. O. Hellsten and L. Nardi, "Vanilla Bayesian optimization performs great
       in high dimensions", ICML 2024, arXiv:2402.02229 (length-scale prior scaled with sqrt(d)).

    Examples
    --------
    >>> import numpy as np
    >>> X = np.linspace(0, 1, 8)[:, None]
    >>> gp = GaussianProcessSurrogate(random_state=0).fit(X, np.sin(6 * X[:, 0]))
    >>> mean, std = gp.predict(np.array([[0.5]]), return_std=True)
    >>> bool(abs(mean[0] - np.sin(3.0)) < 0.05)
    True
    """

    name = "gp"
    has_std = True

    def __init__(
        self,
        *,
        n_restarts: int = 2,
        noise: bool = True,
        length_scale_bounds: tuple[float, float] = (1e-2, 1e2),
        length_scale_prior: tuple[float, float] | None = _LENGTH_SCALE_PRIOR,
        max_fit_points: int | None = 150,
        max_iter: int = 200,
        random_state: int | np.random.RandomState | None = None,
        warm_kernel: Kernel | None = None,
        optimize: bool = True,
    ) -> None:
        self.warm_kernel = warm_kernel
        self.optimize = optimize
        self.n_restarts = n_restarts
        self.noise = noise
        self.length_scale_bounds = length_scale_bounds
        self.length_scale_prior = length_scale_prior
        self.max_fit_points = max_fit_points
        self.max_iter = max_iter
        self.random_state = random_state

    # ---- fitting

    def _check_params(self) -> tuple[float, float]:
        if isinstance(self.n_restarts, bool) or not isinstance(self.n_restarts, numbers.Integral) or self.n_restarts < 0:
            raise ValueError(f"n_restarts must be a non-negative integer, got {self.n_restarts!r}.")
        if isinstance(self.max_iter, bool) or not isinstance(self.max_iter, numbers.Integral) or self.max_iter < 1:
            raise ValueError(f"max_iter must be a positive integer, got {self.max_iter!r}.")
        if self.max_fit_points is not None and (
            isinstance(self.max_fit_points, bool) or not isinstance(self.max_fit_points, numbers.Integral)
            or self.max_fit_points < 2
        ):
            raise ValueError(f"max_fit_points must be None or an integer >= 2, got {self.max_fit_points!r}.")
        if not isinstance(self.noise, bool | np.bool_):
            raise ValueError(f"noise must be True or False, got {self.noise!r}.")
        try:
            low, high = (float(b) for b in self.length_scale_bounds)
        except (TypeError, ValueError):
            raise ValueError(f"length_scale_bounds must be a pair (low, high), got {self.length_scale_bounds!r}.") from None
        if not (0.0 < low < high < math.inf):
            raise ValueError(f"length_scale_bounds must satisfy 0 < low < high < inf, got {self.length_scale_bounds!r}.")
        if self.length_scale_prior is not None:
            try:
                median, spread = (float(v) for v in self.length_scale_prior)
            except (TypeError, ValueError):
                raise ValueError(
                    f"length_scale_prior must be None or a pair (median, log_std), got {self.length_scale_prior!r}."
                ) from None
            if not (0.0 < median < math.inf and 0.0 < spread < math.inf):
                raise ValueError(f"length_scale_prior must have a positive median and log_std, got {self.length_scale_prior!r}.")
        return low, high

    def _prior(self, n_dims: int) -> tuple[float, float] | None:
        """Centre and spread of the normal prior on each log length-scale, for ``n_dims`` inputs.

        The median grows like sqrt(n_dims) (Hvarfner, Hellsten & Nardi 2024): the typical distance
        between points of the unit cube does, so a fixed median would call every function of many
        inputs rough.
        """
        if self.length_scale_prior is None:
            return None
        median, spread = (float(v) for v in self.length_scale_prior)
        return math.log(median) + 0.5 * math.log(n_dims), spread

    def _own_kernel(self, kernel: Kernel, n_dims: int) -> bool:
        """Whether ``kernel`` has this model's structure, which :func:`_neg_log_posterior` assumes."""
        signal = kernel.k1 if self.noise and isinstance(kernel, Sum) and isinstance(kernel.k2, WhiteKernel) else kernel
        return (isinstance(signal, Product) and isinstance(signal.k1, ConstantKernel) and isinstance(signal.k2, Matern)
                and signal.k2.nu == 2.5 and kernel.n_dims == 1 + n_dims + int(self.noise))

    def _initial_kernel(self, n_dims: int, bounds: tuple[float, float]) -> Kernel:
        # A previous fit's kernel (same inputs) is the best start: the optimiser then needs a few
        # steps instead of a search, which is what keeps refits cheap during infill.
        if self.warm_kernel is not None and self._own_kernel(self.warm_kernel, n_dims):
            return clone(self.warm_kernel)
        # gp.md section 1: amplitude bounds suit a unit-variance (normalised) prior. The first start
        # is the prior's median length-scale (0.2 without a prior: what n ~ 10 d points resolve),
        # moved inside the bounds if needed.
        prior = self._prior(n_dims)
        start = float(np.clip(math.exp(prior[0]) if prior else 0.2, *bounds))
        signal = ConstantKernel(1.0, _AMPLITUDE_BOUNDS) * Matern(
            length_scale=np.full(n_dims, start), length_scale_bounds=bounds, nu=2.5
        )
        if self.noise:
            return signal + WhiteKernel(1e-6, noise_level_bounds=(1e-10, 1e-2))
        return signal

    def fit(self, X: np.ndarray, y: np.ndarray) -> GaussianProcessSurrogate:
        """Fit the kernel hyper-parameters (maximum a posteriori), then condition on every design.

        Parameters
        ----------
        X : array-like of shape (n_points, n_dims)
            Designs in the unit cube; at least 2.
        y : array-like of shape (n_points,)
            Solver outputs, all finite.

        Returns
        -------
        self : GaussianProcessSurrogate

        Raises
        ------
        ValueError
            On wrong shapes, NaN/inf, points outside the unit cube, or invalid parameters.
        numpy.linalg.LinAlgError
            If the kernel matrix cannot be factorised even with jitter 1e-4 (near-duplicate points).
        """
        bounds = self._check_params()
        X, y = _check_Xy(X, y, min_points=2)
        self.warnings_: list[str] = []
        self.y_mean_ = float(np.mean(y))
        constant = bool(np.ptp(y) == 0.0)
        if constant:
            self.y_std_ = 1e-6 * max(1.0, abs(self.y_mean_))
            self.warnings_.append(
                f"ConstantTarget: y is constant ({self.y_mean_:.6g}); the kernel was not fitted and the predicted std is "
                "negligible, so use space-filling designs until y varies."
            )
        else:
            self.y_std_ = float(np.std(y))
        y_norm = (y - self.y_mean_) / self.y_std_
        kernel = self._initial_kernel(X.shape[1], bounds)
        alpha = _ALPHA_WITH_NOISE if self.noise else _ALPHA_WITHOUT_NOISE
        if not constant and bool(self.optimize):
            kernel = self._search(kernel, X, y_norm, alpha)
        self.model_, self.alpha_ = self._factorise(kernel, X, y_norm, alpha=alpha)
        if not np.isfinite(self.model_.log_marginal_likelihood_value_):
            self.warnings_.append("NonFiniteLikelihood: the fitted log marginal likelihood is not finite.")
        self.kernel_ = self.model_.kernel_
        self.X_, self.y_ = X, y
        self.n_pending_ = 0
        return self

    def _search(self, kernel: Kernel, X: np.ndarray, y_norm: np.ndarray, alpha: float) -> Kernel:
        """Hyper-parameters by maximum a posteriori: L-BFGS-B from the initial kernel and ``n_restarts`` prior draws.

        Why each choice:

        * A weak log-normal prior on the length-scales (when ``length_scale_prior`` is set). With
          few designs the likelihood is often highest for a degenerate kernel: an active input
          declared inactive (length-scale at 100) or a spiky fit (at 0.01), and expected
          improvement then crawls along an edge of the space. The prior costs a few nats, which
          n > ~10 d designs outvote, so it only matters when the data cannot decide.
        * At most ``max_fit_points`` designs, drawn at random, enter the likelihood (the subset-of-data
          estimate, Rasmussen & Williams 2006 section 8.3.1). The likelihood costs O(n^3) per
          evaluation and is needed ~50-200 times per start; the hyper-parameters of a stationary
          kernel are well determined by a few hundred points, while the model is then conditioned
          on every design (one factorisation).
        * Restarts are drawn from the prior, not uniformly over the bounds: a start at a length-scale of
          1e-2 or 1e2 spends its iterations leaving a region the prior already rules out.
        * The likelihood and its gradient are computed by :func:`_neg_log_posterior`, about 8x
          faster than scikit-learn's generic kernel gradient for this kernel.
        """
        rng = np.random.default_rng(self.random_state if not isinstance(self.random_state, np.random.RandomState)
                                    else self.random_state.randint(2**31))
        n, d = X.shape
        if self.max_fit_points is not None and n > self.max_fit_points:
            keep = np.sort(rng.choice(n, int(self.max_fit_points), replace=False))
            X, y_norm = X[keep], y_norm[keep]
        log_bounds = kernel.bounds
        prior = self._prior(d)
        starts = [np.clip(kernel.theta, log_bounds[:, 0], log_bounds[:, 1])]
        for _ in range(int(self.n_restarts)):
            theta = starts[0].copy()
            theta[0] = rng.uniform(-1.0, 1.0)  # amplitude within a factor e of the normalised variance
            if prior is not None:
                theta[1 : 1 + d] = rng.normal(prior[0], prior[1], d)
            else:
                theta[1 : 1 + d] = rng.uniform(log_bounds[1 : 1 + d, 0], log_bounds[1 : 1 + d, 1])
            starts.append(np.clip(theta, log_bounds[:, 0], log_bounds[:, 1]))
        best = None
        # One BLAS thread: on matrices of a few hundred rows threads only contend, and on a machine
        # whose cores run solver cases an 80 x 80 inverse took 160 ms with two threads, 0.1 ms with one.
        with threadpool_limits(limits=1, user_api="blas"):
            for x0 in starts:
                result = minimize(_neg_log_posterior, x0, args=(X, y_norm, alpha, bool(self.noise), prior), jac=True,
                                  method="L-BFGS-B", bounds=log_bounds, options={"maxiter": int(self.max_iter)})
                if best is None or result.fun < best.fun:
                    best = result
        assert best is not None
        if best.nit >= int(self.max_iter):
            self.warnings_.append(f"ConvergenceWarning: the hyper-parameter search stopped at max_iter={self.max_iter} iterations.")
        theta = np.clip(best.x, log_bounds[:, 0], log_bounds[:, 1])
        names = ["amplitude"] + [f"length-scale of input {k}" for k in range(d)] + (["noise level"] if self.noise else [])
        for name, value, (low, high) in zip(names, theta, log_bounds, strict=True):
            for side, bound in (("lower", low), ("upper", high)):
                if abs(value - bound) < 1e-3:
                    hint = " (the input barely matters)" if side == "upper" and name.startswith("length") else ""
                    self.warnings_.append(f"ConvergenceWarning: the {name} is at its {side} bound {math.exp(bound):.3g}{hint}.")
        return kernel.clone_with_theta(theta)

    def _factorise(
        self, kernel: Kernel, X: np.ndarray, y_norm: np.ndarray, *, alpha: float, offsets: np.ndarray | None = None
    ) -> tuple[GaussianProcessRegressor, float]:
        """Condition on the data with the kernel as given, retrying with 100x more jitter whenever Cholesky fails.

        A failed Cholesky means near-duplicate points or a kernel close to singular; a larger fixed
        jitter is the remedy scikit-learn itself suggests (gp.md section 1). ``offsets`` (one per row)
        are added to the diagonal besides the jitter: minus the white noise for rows taken as exact.
        """
        while True:
            diag = alpha if offsets is None else alpha + offsets
            model = GaussianProcessRegressor(kernel, alpha=diag, optimizer=None, normalize_y=False)
            try:
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    model.fit(X, y_norm)
            except np.linalg.LinAlgError:
                _record(caught, self.warnings_)
                if alpha * 100 > _ALPHA_MAX * (1 + 1e-9):
                    raise np.linalg.LinAlgError(
                        f"The GP kernel matrix could not be factorised even with jitter alpha={alpha:g}; "
                        "remove duplicate or near-duplicate design points."
                    ) from None
                self.warnings_.append(f"LinAlgError: Cholesky failed with alpha={alpha:g}; retried with {alpha * 100:g}.")
                alpha *= 100
                continue
            _record(caught, self.warnings_)
            return model, alpha

    # ---- prediction

    def _signal_kernel(self) -> Kernel:
        """The fitted kernel without the WhiteKernel term: the covariance of the latent function."""
        return self.kernel_.k1 if self.noise else self.kernel_

    @property
    def noise_std_(self) -> float:
        """The fitted white-noise standard deviation in the units of y (0 without a noise term).

        What the model believes a repeated run at the same design would scatter by; its lower bound
        (1e-10 of the variance on the normalised scale) keeps the kernel matrix well conditioned.
        """
        check_is_fitted(self, "kernel_")
        if not (self.noise and isinstance(self.kernel_, Sum) and isinstance(self.kernel_.k2, WhiteKernel)):
            return 0.0
        return math.sqrt(float(self.kernel_.k2.noise_level)) * self.y_std_

    @property
    def length_scales_(self) -> np.ndarray:
        """Fitted ARD length-scales, shape (n_dims,), in unit-cube coordinates.

        Short means the output varies quickly along that parameter; a value at the upper bound
        means the parameter barely matters.
        """
        check_is_fitted(self, "kernel_")
        matern = self._signal_kernel().k2
        return np.broadcast_to(np.asarray(matern.length_scale, dtype=float), (self.X_.shape[1],)).copy()

    def predict(self, X: np.ndarray, return_std: bool = False) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Posterior mean, and optionally std, of the latent function.

        The std leaves out the fitted ``WhiteKernel`` noise: infill criteria ask how uncertain the
        *function* is, not how noisy a new run would be. scikit-learn's own ``predict`` includes
        that noise, so the variance is computed here from the same Cholesky factor (Rasmussen &
        Williams 2006, Alg. 2.1, lines 4-6).

        Parameters
        ----------
        X : array-like of shape (n_points, n_dims)
            Where to predict; points outside the unit cube are allowed (extrapolation).
        return_std : bool, default=False
            Also return the posterior standard deviation.

        Returns
        -------
        mean : ndarray of shape (n_points,)
            Posterior mean in the units of y.
        std : ndarray of shape (n_points,)
            Latent posterior std in the units of y, floored at ``1e-9 * y_std_``. Only returned
            when ``return_std`` is True.
        """
        check_is_fitted(self, "model_")
        X = _check_X(X, n_dims=self.X_.shape[1])
        signal = self._signal_kernel()
        mean = np.empty(X.shape[0])
        std = np.empty(X.shape[0])
        for start in range(0, X.shape[0], _PREDICT_CHUNK):
            rows = slice(start, start + _PREDICT_CHUNK)
            # The WhiteKernel is zero between distinct input arrays, so the signal kernel alone
            # gives the cross-covariance.
            k_trans, prior_var = self._cross_covariance(signal, X[rows])
            mean[rows] = k_trans @ self.model_.alpha_
            if return_std:
                # LAPACK's triangular solve directly: scipy's wrapper costs more than the solve itself
                # on the few rows an acquisition search predicts at a time.
                v, _ = dtrtrs(self.model_.L_, k_trans.T, lower=1)
                var = prior_var - np.einsum("ij,ij->j", v, v)
                std[rows] = np.sqrt(np.maximum(var, _STD_FLOOR**2))
        mean = mean * self.y_std_ + self.y_mean_
        if return_std:
            return mean, std * self.y_std_
        return mean

    def _cross_covariance(self, signal: Kernel, X: np.ndarray) -> tuple[np.ndarray, np.ndarray | float]:
        """``k(X, X_)`` and the prior variance ``k(x, x)`` of the latent function.

        For the kernel this class builds (constant x Matern-5/2) the formula is evaluated here
        directly: the acquisition search predicts on d + 1 rows hundreds of times per proposal, and
        scikit-learn's generic kernel call cost about as much as the rest of such a prediction.
        """
        if (isinstance(signal, Product) and isinstance(signal.k1, ConstantKernel) and isinstance(signal.k2, Matern)
                and signal.k2.nu == 2.5):
            scales = np.asarray(signal.k2.length_scale, dtype=float)
            sq = cdist(X / scales, self.X_ / scales, "sqeuclidean")
            r = np.sqrt(sq)
            amplitude = float(signal.k1.constant_value)
            return amplitude * (1.0 + _SQRT5 * r + (5.0 / 3.0) * sq) * np.exp(-_SQRT5 * r), amplitude
        return signal(X, self.X_), signal.diag(X)

    # ---- leave-one-out

    def _loo_normalised(self) -> tuple[np.ndarray, np.ndarray]:
        check_is_fitted(self, "model_")
        if self.X_.shape[0] < 2:
            raise ValueError("Leave-one-out needs at least 2 points.")
        n = self.X_.shape[0]
        k_inv = cho_solve((self.model_.L_, True), np.eye(n), check_finite=False)
        diag = np.diag(k_inv)
        # R&W 2006 eq. 5.12: y_i - mu_(i) = [K^-1 y]_i / [K^-1]_ii, and eq. 5.10: var_(i) = 1/[K^-1]_ii.
        return self.model_.alpha_ / diag, 1.0 / np.sqrt(diag)

    def loo_residuals(self) -> np.ndarray:
        """Leave-one-out residuals ``y_i - yhat_(i)`` in closed form, shape (n_points,).

        Each residual is what the model would get wrong at ``x_i`` had it been fitted without that
        point, with the kernel hyper-parameters and the y normalisation held at their full-data
        values (Rasmussen & Williams 2006, eq. 5.12). It costs one n x n inverse from the existing
        Cholesky factor instead of n refits. Because the hyper-parameters have seen every point,
        these residuals are slightly optimistic compared with a full cross-validation. On a
        :meth:`believer` model the fantasised rows are included, so score the original model.

        Returns
        -------
        residuals : ndarray of shape (n_points,)
            In the units of y.
        """
        return self._loo_normalised()[0] * self.y_std_

    def loo_std(self) -> np.ndarray:
        """Leave-one-out predictive std at each training point, shape (n_points,).

        ``sigma_(i) = 1 / sqrt([K^-1]_ii)`` (Rasmussen & Williams 2006, eq. 5.10), the std of a new
        *observation* at ``x_i`` (it includes the fitted noise and jitter). ``loo_residuals() /
        loo_std()`` should look like N(0, 1) draws when the model is well calibrated.
        """
        return self._loo_normalised()[1] * self.y_std_

    # ---- batches

    def believer(self, X_pending: np.ndarray) -> GaussianProcessSurrogate:
        """A new model that treats the posterior mean at pending designs as observed.

        This is the Kriging believer of Ginsbourger, Le Riche & Carraro (2010): designs already
        submitted but not yet returned are "observed" at the current mean, so the mean elsewhere
        stays put while the std near them collapses, and an infill criterion maximised on the new
        model looks elsewhere. The kernel hyper-parameters, the jitter and the y normalisation are
        reused unchanged (``optimizer=None``), so the refit is one Cholesky factorisation instead of
        a likelihood optimisation.

        Parameters
        ----------
        X_pending : array-like of shape (n_pending, n_dims)
            Designs in flight. ``n_pending`` may be 0.

        Returns
        -------
        model : GaussianProcessSurrogate
            A new fitted model; ``self`` is unchanged. ``n_pending_`` counts the fantasised rows and
            ``warnings_`` starts with the warnings of ``self``.
        """
        check_is_fitted(self, "model_")
        X_pending = _check_X(X_pending, n_dims=self.X_.shape[1], name="X_pending")
        return self.condition(X_pending, self.predict(X_pending), exact=True)

    def condition(self, X_new: np.ndarray, y_new: np.ndarray, *, exact: bool = False) -> GaussianProcessSurrogate:
        """A new model that also treats ``y_new`` at ``X_new`` as observed, with the kernel held fixed.

        The rows are not solver results: Kriging-believer fantasies (:meth:`believer`) or values
        imputed where the solver failed. Hyper-parameters, jitter and y normalisation are reused,
        so this is one Cholesky factorisation, and the fitted model's hyper-parameters are not
        swayed by made-up values.

        Parameters
        ----------
        X_new : array-like of shape (n_new, n_dims)
        y_new : array-like of shape (n_new,)
        exact : bool, default=False
            Take the new values as noiseless (the fitted white noise is left off their diagonal), as
            the Kriging believer does with its fantasies; imputed failures keep the noise.

        Returns
        -------
        model : GaussianProcessSurrogate
            A new fitted model; ``self`` is unchanged. ``n_pending_`` counts the added rows.
        """
        check_is_fitted(self, "model_")
        X_new = _check_X(X_new, n_dims=self.X_.shape[1], name="X_new")
        y_new = np.asarray(y_new, dtype=float).reshape(-1)
        if y_new.shape[0] != X_new.shape[0] or not np.all(np.isfinite(y_new)):
            raise ValueError(f"y_new must hold {X_new.shape[0]} finite values, got shape {y_new.shape}.")
        if X_new.shape[0] == 0:
            return copy.deepcopy(self)
        new = type(self)(**self.get_params(deep=False))
        new.warnings_ = list(self.warnings_)
        new.y_mean_, new.y_std_ = self.y_mean_, self.y_std_
        new.X_ = np.vstack([self.X_, X_new])
        new.y_ = np.concatenate([self.y_, y_new])
        # Exact rows (believed values) carry no white noise: the believer takes the mean as a noiseless
        # observation, so the std there vanishes even when the fit found some noise (gp.md section 2).
        noise = float(self.kernel_.k2.noise_level) if exact and self.noise and isinstance(self.kernel_, Sum) \
            and isinstance(self.kernel_.k2, WhiteKernel) else 0.0
        previous = getattr(self, "offsets_", None)
        new.offsets_ = np.concatenate([np.zeros(self.X_.shape[0]) if previous is None else previous,
                                       np.full(X_new.shape[0], -noise)])
        new.model_, new.alpha_ = new._factorise(self.kernel_, new.X_, (new.y_ - new.y_mean_) / new.y_std_, alpha=self.alpha_,
                                                offsets=new.offsets_)
        new.kernel_ = new.model_.kernel_
        new.n_pending_ = self.n_pending_ + X_new.shape[0]
        return new

