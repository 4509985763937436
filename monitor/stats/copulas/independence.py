"""The independence copula C(u, v) = uv (Nelsen 2006, section 2.2)."""

from __future__ import annotations

import numpy as np

from .base import CopulaFamily


class Independence(CopulaFamily):
    """Independence copula: no parameters, tau = rho_S = 0, no tail dependence."""

    name = "independence"
    param_names = ()
    domain = ()
    domain_open = ()
    fit_bounds = ()

    def _cdf(self, u, v, p):
        return u * v

    def _logpdf(self, u, v, p):
        return np.zeros(np.broadcast_shapes(np.shape(u), np.shape(v)))

    def _h_u_given_v(self, u, v, p):
        return np.broadcast_to(u, np.broadcast_shapes(np.shape(u), np.shape(v))).copy()

    def _h_u_given_v_inverse(self, w, v, p):
        return np.broadcast_to(w, np.broadcast_shapes(np.shape(w), np.shape(v))).copy()

    def _kendall_tau(self, p):
        return np.float64(0.0)

    def _spearman_rho(self, p):
        return np.float64(0.0)

    def _tail_lower(self, p):
        return np.float64(0.0)

    def _tail_upper(self, p):
        return np.float64(0.0)

    def _params_from_tau(self, tau):
        return ()

    def _start_params(self, tau):
        return ()
