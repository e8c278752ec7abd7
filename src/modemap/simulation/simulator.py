"""Event-driven simulation of a :class:`~modemap.model.hybrid.HybridModel`.

Continuous form
---------------
The current regime's right-hand side ``f_r(x, u(t))`` is integrated until one
of the regime's outgoing guards crosses zero upwards; the model then switches
to the winning target (the largest guard value) and carries on from the event
time.  Inputs are reconstructed between samples by a *hold* per input column:
``"zoh"`` (zero-order hold: the sample value is held until the next sample) or
``"linear"`` (piecewise-linear interpolation).  ``hold="auto"`` uses the
zero-order hold for inputs that take only two distinct values (a gate or an
on/off command, so that switching on it is sharp) and linear interpolation
otherwise.

Two integrators are used, chosen per regime:

* **Affine regimes** (terms ``1`` and plain variables only:
  ``dx/dt = A x + B u + c``) are advanced with the exact step of the
  matrix exponential of the augmented matrix ``[[A, B, 0, c], [0, 0, I, 0],
  [0, 0, 0, 0], [0, 0, 0, 0]]`` acting on ``[x, u_k, du_k, 1]`` (``du_k`` the
  input slope, zero under the zero-order hold), cached per regime and step
  length.  This is exact for both holds, costs one small matrix-vector product
  per sample and needs no restarts at input edges, so a gate with tens of
  thousands of edges stays fast.  Guards are checked on every sample (at the
  start of a step with the new input, and at its end); a crossing inside a step
  is located by bracketing root finding (``scipy.optimize.brentq``; "Algorithms
  for Minimization without Derivatives", Prentice-Hall, 1973) on the exact
  solution.  Two crossings within
  one sample step (in and out again) are not seen.
  (Matrix exponential with an augmented matrix: "Computing integrals involving
  the matrix exponential", IEEE Transactions on Automatic Control, 1978,
  doi:10.1109/TAC.1978.1101743.)
* **Other regimes** use :func:`scipy.integrate.solve_ivp` with the guards as
  terminal event functions (``direction=+1``), restarted wherever a
  zero-order-held input changes.  ``method="auto"`` picks ``"LSODA"``, or
  ``"Radau"`` when the regime's Jacobian at the start of the stretch has an
  eigenvalue spread above 1e3 that matters on the simulated time span.
  (LSODA: "Automatic selection of methods for solving stiff and nonstiff
  systems of ordinary differential equations", SIAM Journal on Scientific and
  Statistical Computing, 1983; Radau IIA: "Solving Ordinary Differential
  Equations II: Stiff and Differential-Algebraic Problems", Springer, 1996.)

Discrete form
-------------
``x[k+1] = f_r(x[k], u[k])``; at every sample ``k >= 1`` the guards of the
current regime are evaluated on ``[x[k], u[k]]`` first and a firing guard sets
the regime used for that sample.  The map is iterated in blocks (affine
regimes with precomputed input forcing) and the guards and bounds of a block
are checked in one vectorised evaluation.  This matches how :mod:`modemap.model.guards`
pairs the variables at sample ``k`` with the regime observed at ``k``.

Protection
----------
Every run ends, with a status and a message as :func:`scipy.integrate.solve_ivp`
reports them:

* Blow-up: a state leaving ``[min - blowup*range, max + blowup*range]`` (or becoming
  non-finite) stops the run, status 1.  ``min, max`` is the state's range in the
  model's ``data_range`` (the training data); for a state without one, the span of
  the regimes' training centroids (``metadata["regime_centroids"]``) and the initial
  value, with ``range`` at least the largest of their magnitudes and 1; with neither,
  the initial value plus or minus ``DEFAULT_BOX`` (1e6) times ``max(1, |x0|)``.
* Chattering: more than ``max_switch_rate`` switches per unit time over the
  last 10 switches (default cap: 2 per smallest sample step), or more than
  ``n_regimes + 1`` switches at one instant (guards that form a cycle all firing
  at once), stops the run, status 2.
* Budgets: more than ``max_nfev`` right-hand-side evaluations by the ODE solver
  (default: 20,000 plus 20 per output sample) or more than ``max_seconds`` of wall
  time (default 60 s) stops the run, status 3.  A fast oscillation over a long
  horizon ends here.  (Re-simulating the runs of the reactor and water-heater demos
  took 0.4 to 0.8 evaluations per sample.)  A time grid with a step below 1e-12 of
  the model's sampling step is refused before the run
  (:class:`~modemap.SimulationError`); without a sampling step in the model such a
  grid ends at the budget.
* Solver failure: status -1 with the solver's message.

Samples after a stop hold NaN states and regime -1.

Initial regime
--------------
When ``regime0`` is not given, the candidates are the regimes none of whose
outgoing guards fires at ``[x0, u(t0)]``.  One candidate is taken as is; among
several (a hysteresis band), the nearest centroid in
``model.metadata["regime_centroids"]`` (``{"<id>": [state values]}``) decides
when present, otherwise the candidate whose largest guard value is the most
negative (deepest inside), ties to the lowest id.  With no candidate, the
regime with the smallest largest guard value is used.
"""

from __future__ import annotations

import time as _clock
from dataclasses import dataclass, field

import numpy as np
from scipy import integrate, linalg, optimize

from modemap._exceptions import SimulationError
from modemap._params import Interval, check_value
from modemap.model.hybrid import HybridModel, RegimeModel
from modemap.terms.expressions import quote_name
from modemap.terms.library import TermLibrary

__all__ = ["DEFAULT_BOX", "SimulationResult", "simulate"]

_EPS_FIRE = 1e-9  # a guard must exceed this to fire at the very start of a stretch
_CHATTER_WINDOW = 10
_CHUNK = 4096  # largest block of exact steps between guard checks
DEFAULT_BOX = 1e6  # blow-up half-width, in max(1, |x0|), for a state the model has no range of
_NFEV_BASE, _NFEV_PER_SAMPLE = 20_000, 20  # default step budget
_MIN_STEP_RATIO = 1e-12  # smallest time step accepted, relative to the model's sampling step


@dataclass
class SimulationResult:
    """Outcome of :func:`simulate`.

    Attributes
    ----------
    time : ndarray of shape (n,)
    states : ndarray of shape (n, n_states)
        NaN after a stop.
    regimes : ndarray of shape (n,) of int
        Regime active at each time (after any switch at that very time); -1
        after a stop.
    switches : list of (float, int, int)
        ``(time, from, to)`` in order.
    status : int
        0 finished, 1 stopped by blow-up, 2 stopped by the chattering cap or a switching
        loop at one instant, 3 stopped by the step or wall-time budget, -1 solver failure.
    message : str
    nfev : int
        Right-hand-side evaluations by the ODE solver (0 for exact steps).
    """

    time: np.ndarray
    states: np.ndarray
    regimes: np.ndarray
    switches: list[tuple[float, int, int]] = field(default_factory=list)
    status: int = 0
    message: str = "finished"
    nfev: int = 0


def _expm(M: np.ndarray) -> np.ndarray:
    """Matrix exponential; scaling and squaring with a degree-18 Taylor sum for small matrices.

    SciPy's rational-approximation ``expm`` costs ~0.5 ms per call on tiny matrices;
    root finding on the exact solution calls it often.  The Taylor remainder after
    scaling to norm <= 0.5 is below 0.5**19 / 19! (about 1e-23) relative, far below
    double precision.
    """
    if M.shape[0] > 12:
        return linalg.expm(M)
    nrm = float(np.max(np.sum(np.abs(M), axis=1)))
    s = max(0, int(np.ceil(np.log2(nrm / 0.5)))) if nrm > 0.5 else 0
    A = M / (2.0**s)
    E = np.eye(M.shape[0])
    term = np.eye(M.shape[0])
    for i in range(1, 19):
        term = term @ A / i
        E = E + term
    for _ in range(s):
        E = E @ E
    return E


class _Stop(Exception):
    def __init__(self, status: int, message: str) -> None:
        super().__init__(message)
        self.status = status
        self.message = message


class _TermEval:
    """Evaluate ``terms(z) @ W + b``; a plain matrix product when the terms are linear."""

    def __init__(self, terms: list[str], W: np.ndarray, b: np.ndarray, variables: list[str]):
        W = np.asarray(W, dtype=float).reshape(len(terms), -1)
        self.b = np.asarray(b, dtype=float).reshape(-1).copy()
        pos = {quote_name(v): i for i, v in enumerate(variables)}  # a variable's term
        if all(t == "1" or t in pos for t in terms):
            self.lin = np.zeros((len(variables), W.shape[1]))
            for i, t in enumerate(terms):
                if t == "1":
                    self.b += W[i]
                else:
                    self.lin[pos[t]] += W[i]
            self.lib = None
        else:
            self.lin = None
            self.lib = TermLibrary.from_terms(list(terms), list(variables)) if terms else None
            self.W = W

    def __call__(self, Z: np.ndarray) -> np.ndarray:
        """``Z`` of shape (n, n_vars) -> (n, n_out)."""
        if self.lin is not None:
            return Z @ self.lin + self.b
        if self.lib is None:
            return np.broadcast_to(self.b, (Z.shape[0], self.b.size)).copy()
        return self.lib.transform(Z) @ self.W + self.b

    def one(self, z: np.ndarray) -> np.ndarray:
        return self(z[None, :])[0]


class _Regime:
    """One regime's right-hand side and outgoing guards, ready to evaluate."""

    def __init__(self, reg: RegimeModel, model: HybridModel) -> None:
        variables = model.variables
        ns = len(model.states)
        coef = np.asarray(reg.coefficients, dtype=float).reshape(len(reg.terms), ns)
        self.id = reg.id
        self.rhs = _TermEval(list(reg.terms), coef, np.zeros(ns), variables)
        self.affine = self.rhs.lin is not None
        guards = model.guards_from(reg.id)
        self.targets = [g.target for g in guards]
        terms: list[str] = []
        for g in guards:
            terms += [t for t in g.terms if t not in terms]
        W = np.zeros((len(terms), len(guards)))
        for j, g in enumerate(guards):
            for t, w in zip(g.terms, np.asarray(g.weights, dtype=float), strict=True):
                W[terms.index(t), j] += w
        off = np.array([g.offset for g in guards], dtype=float)
        self.guard = _TermEval(terms, W, off, variables) if guards else None
        self.phi_cache: dict[float, np.ndarray] = {}
        self.method: str | None = None
        self.chunk = 16
        self.fire_idx: np.ndarray | None = None
        ns = len(model.states)
        self.input_only = bool(
            self.guard is not None
            and self.guard.lin is not None
            and not np.any(self.guard.lin[:ns])
        )

    def guard_values(self, Z: np.ndarray) -> np.ndarray:
        if self.guard is None:
            return np.full((Z.shape[0], 0), -np.inf)
        return self.guard(Z)


class _Inputs:
    """Input samples with a hold per column."""

    def __init__(self, time: np.ndarray, U: np.ndarray, zoh: np.ndarray) -> None:
        self.t, self.U, self.zoh = time, U, zoh
        n = time.size
        h = np.diff(time) if n > 1 else np.ones(1)
        slope = np.zeros_like(U)
        if n > 1:
            slope[:-1] = np.diff(U, axis=0) / h[:, None]
        slope[:, zoh] = 0.0
        self.slope = slope
        changes = np.any(np.diff(U[:, zoh], axis=0) != 0, axis=1) if n > 1 else np.zeros(0, bool)
        self.breaks = np.flatnonzero(changes) + 1  # sample indices where a held input jumps

    def at(self, tq: float, k: int) -> np.ndarray:
        """Value at ``tq`` inside step ``k`` (``t[k] <= tq <= t[k+1]``), right-continuous."""
        return self.U[k] + self.slope[k] * (tq - self.t[k])

    def next_break(self, k: int) -> int:
        i = np.searchsorted(self.breaks, k, side="right")
        return int(self.breaks[i]) if i < self.breaks.size else self.t.size - 1


def _check_request(
    model: HybridModel, time: np.ndarray, x0: np.ndarray, inputs: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    ns, ni = len(model.states), len(model.inputs)
    time = np.asarray(time, dtype=float).reshape(-1)
    if time.size < 1 or not np.all(np.isfinite(time)):
        raise SimulationError("time: need at least one finite time value")
    if time.size > 1 and np.any(np.diff(time) <= 0):
        raise SimulationError("time: values must be strictly increasing")
    step = float(model.step) if np.isfinite(model.step) and model.step > 0 else None
    if time.size > 1 and step is not None:
        k = int(np.argmin(np.diff(time)))
        if time[k + 1] - time[k] < _MIN_STEP_RATIO * step:
            raise SimulationError(
                f"time: step of {time[k + 1] - time[k]:g} after sample {k + 1} is below "
                f"{_MIN_STEP_RATIO:g} of the model's sampling step {step:g}; use a coarser grid"
            )
    x0 = np.asarray(x0, dtype=float).reshape(-1)
    if x0.size != ns:
        raise SimulationError(
            f"x0 has {x0.size} values but the model has {ns} states {model.states}"
        )
    if not np.all(np.isfinite(x0)):
        raise SimulationError("x0 contains NaN or infinite values")
    if ni == 0:
        U = np.zeros((time.size, 0))
    else:
        if inputs is None:
            raise SimulationError(f"inputs missing: the model needs columns {model.inputs}")
        U = np.asarray(inputs, dtype=float)
        if U.ndim == 1 and ni == 1:
            U = U[:, None]
        if U.shape != (time.size, ni):
            raise SimulationError(
                f"inputs have shape {U.shape}; expected ({time.size}, {ni}) for {model.inputs}"
            )
        if not np.all(np.isfinite(U)):
            raise SimulationError("inputs contain NaN or infinite values")
    if not model.regimes:
        raise SimulationError("the model has no regimes")
    if model.form not in ("continuous", "discrete"):
        raise SimulationError(f"model form must be 'continuous' or 'discrete', not {model.form!r}")
    return time, x0, U


def _hold_mask(U: np.ndarray, hold: str) -> np.ndarray:
    if hold == "zoh":
        return np.ones(U.shape[1], dtype=bool)
    if hold == "linear":
        return np.zeros(U.shape[1], dtype=bool)
    if hold != "auto":
        raise SimulationError(f"hold must be 'auto', 'zoh' or 'linear', not {hold!r}")
    return np.array([np.unique(U[:, j]).size <= 2 for j in range(U.shape[1])], dtype=bool)


def _bounds(
    model: HybridModel, blowup: float, x0: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The blow-up box ``(lo, hi)`` per state and the scale of each state (for ``atol``).

    See the module notes: the training range, else the regimes' centroids, else a wide
    box around ``x0``.
    """
    ns = len(model.states)
    lo, hi = np.empty(ns), np.empty(ns)
    scale = np.maximum(np.abs(x0), 1.0)
    cents = model.metadata.get("regime_centroids") if model.metadata else None
    for j, s in enumerate(model.states):
        pair = np.asarray(model.data_range.get(s, (np.nan, np.nan)), dtype=float)
        if np.all(np.isfinite(pair)):
            a, b = float(pair[0]), float(pair[1])
            span = max(b - a, 1e-12 * max(abs(a), abs(b), 1.0))
            lo[j], hi[j] = a - blowup * span, b + blowup * span
            scale[j] = (hi[j] - lo[j]) / (1 + 2 * blowup)  # the span, as rounded before
            continue
        seen = _centroid_values(cents, j)
        if seen.size:
            a, b = min(seen.min(), x0[j]), max(seen.max(), x0[j])
            span = max(b - a, abs(a), abs(b), 1.0)
            lo[j], hi[j] = a - blowup * span, b + blowup * span
        else:
            half = DEFAULT_BOX * max(1.0, abs(float(x0[j])))
            lo[j], hi[j] = x0[j] - half, x0[j] + half
    return lo, hi, scale


def _centroid_values(cents: object, j: int) -> np.ndarray:
    """The finite values of state ``j`` among the regimes' centroids (none when absent)."""
    if not isinstance(cents, dict):
        return np.zeros(0)
    out = []
    for values in cents.values():
        if isinstance(values, list | tuple) and len(values) > j:
            try:
                v = float(values[j])
            except (TypeError, ValueError):
                continue
            if np.isfinite(v):
                out.append(v)
    return np.array(out, dtype=float)


def _initial_regime(model: HybridModel, regs: dict[int, _Regime], z0: np.ndarray) -> int:
    worst = {
        rid: float(np.max(r.guard_values(z0[None]), initial=-np.inf)) for rid, r in regs.items()
    }
    cand = [rid for rid, v in worst.items() if v <= 0.0]
    if len(cand) == 1:
        return cand[0]
    if not cand:
        return min(worst, key=lambda r: (worst[r], r))
    cents = model.metadata.get("regime_centroids") if model.metadata else None
    if isinstance(cents, dict) and all(str(r) in cents for r in cand):
        ns = len(model.states)
        d = {r: float(np.sum((np.asarray(cents[str(r)], float)[:ns] - z0[:ns]) ** 2)) for r in cand}
        return min(cand, key=lambda r: (d[r], r))
    return min(cand, key=lambda r: (worst[r], r))


class _Sim:
    """The state machine of one simulation (kept out of the public function)."""

    def __init__(self, model, time, x0, U, zoh, *, rate, blowup, rtol, atol, method, budget):
        self.model, self.time = model, time
        self.inp = _Inputs(time, U, zoh)
        self.regs = {r.id: _Regime(r, model) for r in model.regimes}
        self.ns = len(model.states)
        self.lo, self.hi, scale = _bounds(model, blowup, x0)
        self.max_nfev, max_seconds = budget
        self.max_seconds = max_seconds
        self.deadline = _clock.monotonic() + max_seconds if max_seconds is not None else None
        self.rtol, self.method = rtol, method
        self.h = np.diff(time)
        self.h_uniform = bool(
            self.h.size and np.ptp(self.h) <= 1e-9 * max(float(np.max(np.abs(time))), 1.0)
        )
        for reg in self.regs.values():
            if reg.input_only and np.all(zoh):
                Zu = np.hstack([np.zeros((time.size, self.ns)), U])
                reg.fire_idx = np.flatnonzero(reg.guard_values(Zu).max(axis=1) > _EPS_FIRE)
        self.atol = rtol * scale if atol is None else atol
        min_step = float(np.min(np.diff(time))) if time.size > 1 else 1.0
        self.rate = float(rate) if rate is not None else 2.0 / min_step
        n = time.size
        self.X = np.full((n, self.ns), np.nan)
        self.R = np.full(n, -1, dtype=np.int64)
        self.switches: list[tuple[float, int, int]] = []
        self.nfev = 0
        self.same_time = 0

    # -- helpers ------------------------------------------------------------------------
    def z(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        return np.concatenate([x, u])

    def check_time(self, t: float) -> None:
        """Stop (status 3) once the wall-time budget is used up."""
        if self.deadline is not None and _clock.monotonic() > self.deadline:
            raise _Stop(
                3,
                f"stopped at t={t:g}: wall-time budget of {self.max_seconds:g} s used up "
                f"(max_seconds)",
            )

    def check_nfev(self, t: float) -> None:
        """Stop (status 3) once the solver has used its step budget; checks time too."""
        self.nfev += 1
        if self.nfev > self.max_nfev:
            raise _Stop(
                3,
                f"stopped at t={t:g}: step budget of {self.max_nfev} right-hand-side "
                f"evaluations used up (max_nfev); the model changes too fast for this "
                f"time grid or horizon",
            )
        if self.nfev % 256 == 0:
            self.check_time(t)

    def check_bounds(self, x: np.ndarray, t: float) -> None:
        if not np.all(np.isfinite(x)) or np.any(x < self.lo) or np.any(x > self.hi):
            raise _Stop(1, f"stopped at t={t:g}: state left the blow-up box (blowup factor)")

    def switch(self, t: float, r: int, target: int, k: int) -> int:
        last = self.switches[-1][0] if self.switches else None
        self.same_time = self.same_time + 1 if last is not None and t == last else 0
        self.switches.append((float(t), int(r), int(target)))
        if self.same_time > len(self.regs):
            loop = [a for _, a, _ in self.switches[-self.same_time - 1 :]] + [int(target)]
            raise _Stop(
                2,
                f"stopped at t={t:g}: switching loop at one instant (regimes "
                f"{' -> '.join(str(r) for r in loop)} ...: guards that form a cycle all fire)",
            )
        w = _CHATTER_WINDOW
        if len(self.switches) > w and t - self.switches[-w - 1][0] < w / self.rate:
            raise _Stop(
                2,
                f"stopped at t={t:g}: chattering (more than {self.rate:g} switches per unit time)",
            )
        if abs(t - self.time[k]) <= 1e-12 * max(1.0, abs(t)):
            self.R[k] = target
        return int(target)

    def immediate(self, t: float, x: np.ndarray, r: int, k: int) -> int:
        """Apply switches whose guards already fire at (t, x); return the regime."""
        while True:
            g = self.regs[r].guard_values(self.z(x, self.inp.at(t, k))[None])[0]
            if g.size == 0 or g.max() <= _EPS_FIRE:
                return r
            r = self.switch(t, r, self.regs[r].targets[int(np.argmax(g))], k)

    # -- continuous form ------------------------------------------------------------------
    def run_continuous(self, x0: np.ndarray, r: int) -> None:
        time, n = self.time, self.time.size
        self.X[0], self.R[0] = x0, r
        t, x, k = float(time[0]), x0.copy(), 0
        self.check_bounds(x, t)
        while k < n - 1:
            self.check_time(t)
            r = self.immediate(t, x, r, k)
            reg = self.regs[r]
            if reg.affine:
                t, x, k, r = self.advance_exact(t, x, k, reg)
            else:
                t, x, k, r = self.advance_ode(t, x, k, reg)

    def phi(self, reg: _Regime, h: float, cache: bool = True) -> np.ndarray:
        key = float(np.round(h, 12))
        if cache and key in reg.phi_cache:
            return reg.phi_cache[key]
        ns, ni = self.ns, len(self.model.inputs)
        dim = ns + 2 * ni + 1
        M = np.zeros((dim, dim))
        M[:ns, :ns] = reg.rhs.lin[:ns].T
        M[:ns, ns : ns + ni] = reg.rhs.lin[ns:].T
        M[:ns, -1] = reg.rhs.b
        M[ns : ns + ni, ns + ni : ns + 2 * ni] = np.eye(ni)
        P = _expm(M * h)[:ns]
        if cache:
            if len(reg.phi_cache) > 64:
                reg.phi_cache.clear()
            reg.phi_cache[key] = P
        return P

    def exact_state(self, reg, x, u, du, h, cache=True) -> np.ndarray:
        return self.phi(reg, h, cache) @ np.concatenate([x, u, du, [1.0]])

    def advance_exact(self, t, x, k, reg):
        """Exact steps in an affine regime until a switch, a stop or the end."""
        time, inp, n = self.time, self.inp, self.time.size
        if t > time[k]:  # finish a partial step after an event
            h = time[k + 1] - t
            u, du = inp.at(t, k), inp.slope[k]
            x1 = self.exact_state(reg, x, u, du, h, cache=False)
            ev = self.crossing(reg, t, x, u, du, k, x1, h)
            if ev is not None:
                return ev
            self.check_bounds(x1, time[k + 1])
            k += 1
            self.X[k], self.R[k] = x1, reg.id
            return float(time[k]), x1, k, reg.id
        while k < n - 1:
            stop = min(n - 1, k + reg.chunk)
            if reg.fire_idx is not None:  # guards on held inputs only: next firing known
                j = int(np.searchsorted(reg.fire_idx, k, side="right"))
                if j < reg.fire_idx.size:
                    stop = min(stop, int(reg.fire_idx[j]))
            xs, U0, S, h = self.exact_steps(reg, x, k, stop)
            kind, first = self.first_event(reg, xs, U0, S, h)
            upto = stop - k if kind == "" else first
            self.X[k + 1 : k + upto + 1] = xs[1 : upto + 1]
            self.R[k + 1 : k + upto + 1] = reg.id
            if kind == "":
                reg.chunk = min(2 * reg.chunk, _CHUNK)
                # back to the caller, which checks the guards at the new sample
                return float(time[stop]), xs[-1], stop, reg.id
            reg.chunk = max(16, 2 * first)
            if kind == "start":
                return float(time[k + first]), xs[first], k + first, reg.id
            if kind == "bad":
                self.check_bounds(xs[first + 1], time[k + first + 1])
            i = first
            ev = self.crossing(reg, time[k + i], xs[i], U0[i], S[i], k + i, xs[i + 1], h[i])
            if ev is not None:
                return ev
            raise _Stop(-1, f"stopped at t={time[k + i]:g}: guard crossing not located")
        return float(time[k]), x, k, reg.id

    def exact_steps(self, reg, x, k, stop):
        """States at samples k..stop by exact steps; also the inputs, slopes and steps used."""
        inp, ns = self.inp, self.ns
        U0, S = inp.U[k:stop], inp.slope[k:stop]
        h = self.h[k:stop]
        m = stop - k
        xs = np.empty((m + 1, ns))
        xs[0] = x
        if self.h_uniform:
            P = self.phi(reg, float(h[0]))
            Px, Pf = P[:, :ns], P[:, ns:]
            forcing = U0 @ Pf[:, : U0.shape[1]].T + S @ Pf[:, U0.shape[1] : -1].T + Pf[:, -1]
            for i in range(m):
                xs[i + 1] = Px @ xs[i] + forcing[i]
        else:
            for i in range(m):
                xs[i + 1] = self.exact_state(reg, xs[i], U0[i], S[i], float(h[i]))
        return xs, U0, S, h

    def first_event(self, reg, xs, U0, S, h) -> tuple[str, int]:
        """Earliest event in a block: a guard firing at a step start (after the first), a
        crossing inside a step, or a state out of bounds; ("", -1) when none."""
        m = h.size
        first, kind = m, ""
        if reg.guard is not None:
            if m > 1:
                g_start = reg.guard_values(np.hstack([xs[1:-1], U0[1:]]))
                hit = np.flatnonzero(g_start.max(axis=1) > _EPS_FIRE)
                if hit.size:
                    first, kind = int(hit[0]) + 1, "start"
            if not (reg.fire_idx is not None and not S.any()):
                g_end = reg.guard_values(np.hstack([xs[1:], U0 + S * h[:, None]]))
                hit = np.flatnonzero(g_end.max(axis=1) > 0)
                if hit.size and hit[0] < first:
                    first, kind = int(hit[0]), "end"
        x1 = xs[1:]
        bad = ~np.all(np.isfinite(x1) & (x1 >= self.lo) & (x1 <= self.hi), axis=1)
        hit = np.flatnonzero(bad)
        if hit.size and hit[0] < first:
            first, kind = int(hit[0]), "bad"
        return kind, first

    def crossing(self, reg, t, x, u, du, k, x1, h):
        """Locate a guard crossing inside one exact step; None when none fires at its end."""
        g1 = reg.guard_values(self.z(x1, u + du * h)[None])[0]
        if g1.size == 0 or g1.max() <= 0:
            return None

        def state(tau):
            return self.exact_state(reg, x, u, du, tau, cache=False)

        best = None
        for j in np.flatnonzero(g1 > 0):

            def gj(tau, j=j):
                return reg.guard_values(self.z(state(tau), u + du * tau)[None])[0, j]

            lo_val = gj(0.0)
            tau = 0.0 if lo_val > 0 else optimize.brentq(gj, 0.0, h, xtol=1e-14 * max(1, h))
            if best is None or tau < best[0]:
                best = (tau, j)
        tau, j = best
        te, xe = float(t + tau), state(tau)
        self.check_bounds(xe, te)
        kk = k + 1 if tau >= h else k
        if kk > k:
            self.X[kk], self.R[kk] = xe, reg.id
        r = self.switch(te, reg.id, reg.targets[j], kk)
        return te, xe, kk, r

    def choose_method(self, reg: _Regime, t: float, x: np.ndarray, k: int) -> str:
        if self.method != "auto":
            return self.method
        if reg.method is None:
            u = self.inp.at(t, k)
            f0 = reg.rhs.one(self.z(x, u))[: self.ns]
            J = np.empty((self.ns, self.ns))
            for j in range(self.ns):
                dx = 1e-6 * max(1.0, abs(x[j]))
                xp = x.copy()
                xp[j] += dx
                J[:, j] = (reg.rhs.one(self.z(xp, u)) - f0) / dx
            re = np.abs(np.linalg.eigvals(J).real) if np.all(np.isfinite(J)) else np.zeros(1)
            span = self.time[-1] - self.time[0]
            stiff = re.max() * span > 1e3 and re.max() > 1e3 * max(re.min(), 1e-12)
            reg.method = "Radau" if stiff else "LSODA"
        return reg.method

    def advance_ode(self, t, x, k, reg):
        time, inp = self.time, self.inp
        kb = inp.next_break(k)
        t_end = float(time[kb])
        u_k, s_k = inp.U[k].copy(), inp.slope
        zoh = inp.zoh
        held = inp.U[k, zoh]

        def u_of(tt):
            if (~zoh).any():
                j = min(max(int(np.searchsorted(time, tt, side="right")) - 1, 0), time.size - 2)
                u = inp.U[j] + s_k[j] * (tt - time[j])
                u[zoh] = held
                return u
            return u_k

        def fun(tt, y):
            self.check_nfev(tt)
            return reg.rhs.one(np.concatenate([y, u_of(tt)]))

        events = []
        for j in range(len(reg.targets)):

            def ev(tt, y, j=j):
                return reg.guard.one(np.concatenate([y, u_of(tt)]))[j]

            ev.terminal, ev.direction = True, 1
            events.append(ev)

        def blow(tt, y):
            if not np.all(np.isfinite(y)):
                return 1.0
            return float(np.max(np.concatenate([self.lo - y, y - self.hi])))

        blow.terminal, blow.direction = True, 1
        events.append(blow)
        t_eval = time[k + 1 : kb + 1]
        t_eval = t_eval[t_eval > t]
        try:
            sol = integrate.solve_ivp(
                fun,
                (t, t_end),
                x,
                method=self.choose_method(reg, t, x, k),
                t_eval=t_eval,
                events=events,
                rtol=self.rtol,
                atol=self.atol,
            )
        except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
            # e.g. event location on a right-hand side that stopped being finite
            raise _Stop(-1, f"solver failure at t={t:g}: {exc}") from None
        if sol.status == -1:
            raise _Stop(-1, f"solver failure at t={t:g}: {sol.message}")
        m = np.size(sol.t)
        first = int(np.searchsorted(time, t_eval[0])) if t_eval.size else k + 1
        self.X[first : first + m] = np.asarray(sol.y).reshape(x.size, m).T
        self.R[first : first + m] = reg.id
        if sol.status == 1:
            hits = [(i, e[0]) for i, e in enumerate(sol.t_events) if e.size]
            i_ev, te = min(hits, key=lambda p: p[1])
            xe = sol.y_events[i_ev][0]
            if i_ev == len(events) - 1:
                raise _Stop(1, f"stopped at t={te:g}: state left the blow-up box (blowup factor)")
            kk = min(int(np.searchsorted(time, te, side="right")) - 1, time.size - 2)
            same = [i for i, e in hits if e == te and i < len(events) - 1]
            g = reg.guard.one(np.concatenate([xe, u_of(te)]))
            j = max(same, key=lambda i: g[i])
            if np.isclose(te, time[kk + 1], rtol=0, atol=1e-12 * max(1.0, abs(te))):
                kk += 1
                self.X[kk], self.R[kk] = xe, reg.id
            r = self.switch(float(te), reg.id, reg.targets[j], kk)
            return float(te), np.asarray(xe, float), kk, r
        return t_end, sol.y[:, -1].copy(), kb, reg.id

    # -- discrete form --------------------------------------------------------------------
    def run_discrete(self, x0: np.ndarray, r: int) -> None:
        """Iterate the map in blocks; guards and bounds are checked per block, vectorised."""
        U, n = self.inp.U, self.time.size
        self.X[0], self.R[0] = x0, r
        self.check_bounds(x0, float(self.time[0]))
        k, x = 0, x0.copy()
        while k < n - 1:
            self.check_time(float(self.time[k]))
            reg = self.regs[r]
            stop = min(n - 1, k + reg.chunk)
            xs = self.map_steps(reg, x, k, stop)
            Zb = np.hstack([xs[1:], U[k + 1 : stop + 1]])
            ok = np.all(np.isfinite(xs[1:]) & (xs[1:] >= self.lo) & (xs[1:] <= self.hi), axis=1)
            fire = reg.guard_values(Zb).max(axis=1, initial=-np.inf) > 0
            hits = np.flatnonzero(fire | ~ok)
            f = int(hits[0]) + 1 if hits.size else stop - k
            self.X[k + 1 : k + f + 1] = xs[1 : f + 1]
            self.R[k + 1 : k + f + 1] = r
            if not hits.size:
                reg.chunk = min(2 * reg.chunk, _CHUNK)
                k, x = stop, xs[-1]
                continue
            reg.chunk = max(16, 2 * f)
            k, x = k + f, xs[f]
            if not ok[f - 1]:
                self.X[k] = np.nan
                self.R[k] = -1
                self.check_bounds(x, float(self.time[k]))
            while True:  # a cycle of guards firing at once ends in switch()'s loop cap
                g = self.regs[r].guard_values(Zb[f - 1][None])[0]
                if g.size == 0 or g.max() <= 0:
                    break
                r = self.switch(float(self.time[k]), r, self.regs[r].targets[int(np.argmax(g))], k)

    def map_steps(self, reg: _Regime, x: np.ndarray, k: int, stop: int) -> np.ndarray:
        """States at samples k..stop of the map ``x[i+1] = f(x[i], u[i])`` of one regime."""
        U, ns = self.inp.U, self.ns
        xs = np.empty((stop - k + 1, ns))
        xs[0] = x
        with np.errstate(all="ignore"):
            if reg.affine:
                Lx = reg.rhs.lin[:ns]
                forcing = U[k:stop] @ reg.rhs.lin[ns:] + reg.rhs.b
                for i in range(stop - k):
                    xs[i + 1] = xs[i] @ Lx + forcing[i]
            else:
                for i in range(stop - k):
                    xs[i + 1] = reg.rhs.one(np.concatenate([xs[i], U[k + i]]))
                    if not np.all(np.isfinite(xs[i + 1])):
                        xs[i + 2 :] = np.nan
                        break
        return xs


def simulate(
    model: HybridModel,
    time: np.ndarray,
    x0: np.ndarray,
    inputs: np.ndarray | None = None,
    regime0: int | None = None,
    *,
    max_switch_rate: float | None = None,
    blowup: float = 10.0,
    rtol: float = 1e-6,
    atol: float | np.ndarray | None = None,
    method: str = "auto",
    hold: str = "auto",
    max_nfev: int | None = None,
    max_seconds: float | None = 60.0,
) -> SimulationResult:
    """Simulate a hybrid model from ``x0`` on the time grid ``time``.

    Parameters
    ----------
    model : HybridModel
    time : ndarray of shape (n,)
        Strictly increasing output times; the simulation starts at ``time[0]``.
    x0 : ndarray of shape (n_states,)
    inputs : ndarray of shape (n, n_inputs), optional
        Input samples at ``time``; required when the model has inputs.
    regime0 : int, optional
        Initial regime; classified from ``x0`` when omitted (see module notes).
    max_switch_rate : float, optional
        Chattering cap in switches per unit time (default: 2 per smallest step).
    blowup : float
        Size of the allowed box around the training range, in ranges.
    rtol, atol : float
        Solver tolerances; ``atol`` defaults to ``rtol`` times each state's range.
    method : str
        ``"auto"`` or any :func:`scipy.integrate.solve_ivp` method name.
    hold : {"auto", "zoh", "linear"}
        Reconstruction of inputs between samples.
    max_nfev : int, optional
        Step budget: right-hand-side evaluations the ODE solver may use in all (default:
        20,000 plus 20 per output sample); beyond it the run stops with status 3.
    max_seconds : float or None, default 60
        Wall-time budget of the whole simulation (None: no limit); beyond it the run
        stops with status 3.

    Returns
    -------
    SimulationResult

    Raises
    ------
    SimulationError
        On a malformed request (lengths, shapes, unknown regime).
    """
    time, x0, U = _check_request(model, time, x0, inputs)
    zoh = _hold_mask(U, hold)
    check_value(max_nfev, [Interval(int, 1, None), None], "max_nfev", "simulate")
    check_value(max_seconds, [Interval(float, 0, None, closed="neither"), None], "max_seconds")
    if max_nfev is None:
        max_nfev = _NFEV_BASE + _NFEV_PER_SAMPLE * time.size
    sim = _Sim(
        model, time, x0, U, zoh, rate=max_switch_rate, blowup=blowup, rtol=rtol, atol=atol,
        method=method, budget=(int(max_nfev), max_seconds),
    )  # fmt: skip
    if regime0 is None:
        regime0 = _initial_regime(model, sim.regs, np.concatenate([x0, U[0]]))
    elif int(regime0) not in sim.regs:
        raise SimulationError(
            f"initial regime {regime0} is not a regime of the model (its regimes: "
            f"{', '.join(str(r) for r in sorted(sim.regs))})"
        )
    status, message = 0, "finished"
    try:
        if model.form == "discrete":
            sim.run_discrete(x0, int(regime0))
        else:
            sim.run_continuous(x0, int(regime0))
    except _Stop as stop:
        status, message = stop.status, stop.message
    return SimulationResult(
        time=time,
        states=sim.X,
        regimes=sim.R,
        switches=sim.switches,
        status=status,
        message=message,
        nfev=sim.nfev,
    )
