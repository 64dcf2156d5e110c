"""Surrogate models of a solver output over the unit cube, and their leave-one-out checks.

A campaign spends hours of solver time per design, so every decision after the initial design
(where to run next, when to stop, which parameters matter) is taken on a cheap model of the
solver output instead. Three models live here, one module each (``gp``, ``quadratic``, ``rbf``; the choice in
``choose``), because no single one is right for every
campaign:

* :class:`GaussianProcessSurrogate` -- Kriging with an anisotropic Matern-5/2 kernel. It gives a
  standard error, which expected improvement needs [1]_, and a Kriging-believer refit for
  batches of designs that are still running [5]_.
* :class:`QuadraticSurface` -- the classical second-order response surface fitted by least
  squares [6]_. With a central composite design and a smooth response it is often the best and
  always the most interpretable model.
* :class:`RadialBasisSurrogate` -- a polyharmonic-spline interpolant. It has no hyper-parameters
  to fit, so it is robust when a GP's likelihood is flat, but it gives no standard error.

Each model exposes ``loo_residuals()``, the leave-one-out residuals ``y_i - yhat_(i)`` computed
in closed form from the single fit (no refits): the hat matrix for least squares [3]_, Rippa's
formula for radial basis functions [4]_ and Rasmussen & Williams eq. 5.12 for the GP [2]_.
:func:`choose_surrogate` ranks the candidates on them. Cross-validation is used rather than the
training error because two of the three models interpolate their data exactly.

Every ``X`` is a float array of shape ``(n_points, n_dims)`` in the unit cube ``[0, 1]^n_dims``
(the design space does the scaling), and every ``y`` has shape ``(n_points,)``. Failed solver runs
must be dropped before fitting: NaN in ``y`` is an error, not missing data.

References
----------
.. [1] D. R. Jones, M. Schonlau and W. J. Welch, "Efficient global optimization of expensive
   black-box functions", J. Global Optim. 13(4):455-492, 1998.
.. [2] C. E. Rasmussen and C. K. I. Williams, *Gaussian Processes for Machine Learning*,
   MIT Press, 2006 (Alg. 2.1; section 5.4.2, eqs. 5.10-5.12).
.. [3] D. M. Allen, "The relationship between variable selection and data augmentation and a
   method for prediction", Technometrics 16(1):125-127, 1974.
.. [4] S. Rippa, "An algorithm for selecting a good value for the parameter c in radial basis
   function interpolation", Adv. Comput. Math. 11:193-210, 1999.
.. [5] D. Ginsbourger, R. Le Riche and L. Carraro, "Kriging is well-suited to parallelize
   optimization", in *Computational Intelligence in Expensive Optimization Problems*,
   Springer ALO 2:131-162, 2010.
.. [6] G. E. P. Box and K. B. Wilson, "On the experimental attainment of optimum conditions",
   J. R. Stat. Soc. B 13(1):1-45, 1951.
"""

from sortie.models.choose import ModelScore, Surrogate, choose_surrogate, make_surrogate
from sortie.models.gp import GaussianProcessSurrogate
from sortie.models.quadratic import QuadraticSurface
from sortie.models.rbf import RadialBasisSurrogate

__all__ = [
    "GaussianProcessSurrogate",
    "ModelScore",
    "QuadraticSurface",
    "RadialBasisSurrogate",
    "Surrogate",
    "choose_surrogate",
    "make_surrogate",
]
