"""Coverage factors and the propagation of parameter covariance to converted values (GUM).

For a converted value y = f(r; p) the standard uncertainty of the curve is
u_c(y) = sqrt(g^T V g), g = df/dp, V the parameter covariance (GUM 5.1.2, law of propagation).
A new single reading adds the noise of one observation: u_p(y)^2 = u_c(y)^2 + s^2.
The coverage factor is Student's t at the fit's degrees of freedom when the noise was estimated
from the residuals, and the normal quantile when it was given (GUM G.3, G.4).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from shared.families.base import Array

K_CONVENTION = 2.0  # expanded uncertainty U = k u with k = 2, the reporting convention


def coverage_factor(level: float, dof: float) -> float:
    """Two-sided coverage factor for ``level`` (e.g. 0.95) at ``dof`` degrees of freedom."""
    if not 0.0 < level < 1.0:
        raise ValueError(f"coverage level must be in (0, 1), got {level}")
    q = 0.5 + level / 2.0
    return float(stats.norm.ppf(q) if np.isinf(dof) else stats.t.ppf(q, dof))


def propagate(gradient: Array, covariance: Array) -> Array:
    """sqrt(g^T V g) for each row g of ``gradient`` (n x k)."""
    var = np.einsum("ij,jk,ik->i", gradient, covariance, gradient)
    return np.asarray(np.sqrt(np.maximum(var, 0.0)), dtype=np.float64)
