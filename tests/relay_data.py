"""A closed-form relay oscillator shared by the end-to-end tests."""


def relay_frame(n_runs: int = 3, duration: float = 20.0, step: float = 0.01, noise: float = 0.0):
    """A relay (hysteresis) oscillator, generated in closed form.

    Heating ``dx/dt = 10 - x`` until ``x`` reaches 8, then cooling ``dx/dt = -x`` until it
    falls to 2, and so on.  Each stretch is the textbook first-order response
    ``x(t) = x_inf + (x0 - x_inf) exp(-t)`` (common practice), so switching times are exact:
    each half-cycle lasts ``ln 4``.  Returns a DataFrame ``t [s], run, x [m], true_regime``
    (regime 1 = heating).
    """
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(7)
    frames = []
    for r in range(n_runs):
        t = np.arange(0.0, duration, step)
        x = np.empty_like(t)
        mode = np.empty(t.size, dtype=int)
        x0, on, t0 = 2.0 + 0.5 * r, True, 0.0
        for k, tk in enumerate(t):
            target = 10.0 if on else 0.0
            xk = target + (x0 - target) * np.exp(-(tk - t0))
            if (on and xk >= 8.0) or ((not on) and xk <= 2.0):
                t_hit = t0 + np.log((x0 - target) / ((8.0 if on else 2.0) - target))
                x0, on, t0 = (8.0 if on else 2.0), not on, t_hit
                target = 10.0 if on else 0.0
                xk = target + (x0 - target) * np.exp(-(tk - t0))
            x[k], mode[k] = xk, int(on)
        x = x + noise * rng.normal(size=x.size)
        frames.append(pd.DataFrame({"t [s]": t, "run": r + 1, "x [m]": x, "true_regime": mode}))
    return pd.concat(frames, ignore_index=True)
