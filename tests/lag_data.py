"""First-order lags under piecewise-constant inputs, exact at the samples (shared by tests).

For ``x' = -a x + b u + c`` with ``u`` held over ``[t_k, t_k+1)`` the solution at the next
sample is ``x[k+1] = e^(-a dt) x[k] + (1 - e^(-a dt)) (b u[k] + c) / a`` (textbook: the
matrix-exponential solution of a linear ODE with a zero-order-hold input).
"""

from __future__ import annotations

import numpy as np


def held_lag(x0: float, u, dt, a, b, c=0.0) -> np.ndarray:
    """States at ``len(u) + 1`` samples; ``dt``, ``a``, ``b``, ``c`` scalars or per interval."""
    u = np.asarray(u, dtype=float)
    n = u.size
    dt, a, b, c = (np.broadcast_to(np.asarray(v, dtype=float), (n,)) for v in (dt, a, b, c))
    phi = np.exp(-a * dt)
    x = np.empty(n + 1)
    x[0] = x0
    for k in range(n):
        x[k + 1] = phi[k] * x[k] + (1.0 - phi[k]) * (b[k] * u[k] + c[k]) / a[k]
    return x
