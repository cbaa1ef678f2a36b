"""Growth laws fitted to (size, cost, censored) arrays: polynomial, exponential or inconclusive.

Pure functions over arrays (numpy and scipy only); the fitter never sees a model. Work counts and
timings go through the same code.

How a verdict is reached
------------------------
1. **Log scale.** Costs are modelled as ``ln y = mu(n; theta) + e`` with Gaussian ``e`` (the noise of
   timings and of work counts is multiplicative; least squares on raw costs would let the two
   largest sizes decide everything).
2. **Candidate laws** (:data:`DEFAULT_LAWS`, each a :class:`Law`; pass more to :func:`fit_growth`).
   Every law carries a non-negative overhead ``c0`` parametrised as ``g = ln c0`` so that
   ``mu = logaddexp(g, h(n))`` stays finite and ``c0`` stays positive:

   ========== ===================================== ==============
   name        cost                                   class
   ========== ===================================== ==============
   power       ``c0 + a * n**k``                       polynomial
   nlogn       ``c0 + a * n * (1 + ln n)``             polynomial
   powerlog    ``c0 + a * n**k * (1 + ln n)**m``       polynomial
   exponential ``c0 + a * b**n``                       exponential
   stretched   ``c0 + a * exp(B * (n**gamma - 1) / gamma)`` exponential
   ========== ===================================== ==============

   The stretched exponential ``exp(beta * n**gamma)`` (written in Box-Cox form, ``beta = B /
   gamma``, which fits far faster; ``gamma`` in ``[GAMMA_MIN, 1]``) belongs to the exponential class:
   exact inference on a grid grows like ``exp(c * sqrt(n))`` when the axis counts variables. Its
   lower bound keeps it apart from the power law, which it approaches as ``gamma -> 0``.
   Each law is fitted from several starting points (lines through all points and through the top
   half, on log-log and semi-log axes) by a batched, bounded Levenberg–Marquardt solver.
3. **Censored points** (the cost is only known to be at least the cap) enter through a Tobit
   likelihood (Tobin 1958) on ln cost: observed points contribute the normal density, censored
   points the survival term at their cap. The noise scale is estimated and floored at
   :data:`NOISE_FLOOR` so that deterministic work counts do not make the likelihood infinite. The
   cap is never substituted for the unknown cost (that calls exponential blow-ups polynomial).
4. **Selection between classes** uses ``Lambda = 2 * (loglik_poly - loglik_exp)`` with matched
   parameter counts: ``power`` against ``exponential`` (3 against 3), or ``powerlog`` against
   ``stretched`` (4 against 4) when a nested likelihood-ratio test says ``gamma < 1``.
   ``|Lambda| >= 10`` gives a verdict, ``4 <= |Lambda| < 10`` a leaning, below 4 inconclusive
   (Burnham & Anderson 2002; Kass & Raftery 1995). Within a class, AICc decides whether ``c0`` is
   needed. A verdict is forced to ``inconclusive`` when ``n_max / n_min < 4``, when fewer than 6
   uncensored sizes exist, when the noise exceeds :data:`NOISE_LIMIT`, or when a Wald–Wolfowitz
   runs test finds structure in the residuals (a regime change such as a cache step).
5. **Hold-out check** (not a selector): refit the chosen law without the largest quarter of sizes;
   when any of those sizes falls outside the simultaneous (Bonferroni) 95% prediction band, the
   verdict is downgraded one step (verdict -> leaning -> inconclusive).
6. **Uncertainty**: profile-likelihood intervals with F calibration for degree, base and gamma, or,
   when raw repeats per size are given, the union of that with a bootstrap that resamples repeats
   within each size. ``confidence`` is the posterior weight of the favoured class,
   ``1 / (1 + exp(-|Lambda| / 2))``.
7. **Next sizes** that best discriminate the two laws: the T-optimal criterion of Atkinson &
   Fedorov (1975), ``(mu_P - mu_E)**2 / (2 s**2 + Var mu_P + Var mu_E)``, over a candidate grid,
   keeping the pessimistic predicted cost within ``cap``; and the number of further sizes needed,
   about ``10 / ln(1 + delta**2 / s**2)``.

Flat and decreasing costs: a cost whose fitted degree has a 95% interval inside
``[-FLAT_DEGREE, FLAT_DEGREE]`` is reported as ``polynomial`` of degree about 0 (a constant is
polynomially bounded; an exponential with base 1 is the same function and is not growth); a cost
that decreases significantly is ``inconclusive`` with a reason.

References
----------
Tobin, J. (1958). Estimation of relationships for limited dependent variables. Econometrica 26.
Burnham, K. P. & Anderson, D. R. (2002). Model Selection and Multimodel Inference, 2nd ed.
Kass, R. E. & Raftery, A. E. (1995). Bayes factors. JASA 90:773–795.
Atkinson, A. C. & Fedorov, V. V. (1975). The design of experiments for discriminating between two
rival models. Biometrika 62:57–70.
Wald, A. & Wolfowitz, J. (1940). On a test whether two samples are from the same population.
Ann. Math. Statist. 11:147–162.
Bates, D. M. & Watts, D. G. (1988). Nonlinear Regression Analysis and Its Applications (profile
t / F intervals).
Efron, B. & Tibshirani, R. (1993). An Introduction to the Bootstrap.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import numpy as np
from scipy import special, stats

from profiler.errors import InputError

__all__ = [
    "Law", "LawFit", "Verdict", "Prediction", "fit_growth", "predict", "largest_feasible_size",
    "DEFAULT_LAWS", "POWER", "NLOGN", "POWERLOG", "EXPONENTIAL", "STRETCHED", "NOISE_FLOOR",
    "NOISE_LIMIT", "GAMMA_MIN", "decisive_lambda", "runs_test_pvalue", "register_law",
]

#: Floor of the noise scale on ln cost (deterministic work counts would make it 0).
NOISE_FLOOR = 0.01
#: Above this estimated noise (ln units) no class is chosen.
NOISE_LIMIT = 0.3
#: Smallest stretched-exponential exponent considered (below it, it mimics a power law).
GAMMA_MIN = 0.25
#: |Lambda| thresholds: verdict and leaning (Kass & Raftery 1995: "very strong" and "positive").
LAMBDA_VERDICT = 10.0
LAMBDA_LEANING = 4.0
#: Smallest range n_max / n_min and number of uncensored sizes for a verdict.
MIN_RANGE = 4.0
MIN_UNCENSORED = 6
#: A degree interval inside +-FLAT_DEGREE counts as flat (polynomial of degree about 0).
FLAT_DEGREE = 0.2
#: Extra tolerance (ln units, about 10%) of the hold-out check beyond its prediction band.
HOLDOUT_ALLOWANCE = math.log(1.1)
#: One-sided level of the runs test for structure in residuals.
RUNS_ALPHA = 0.01
#: Residual structure smaller than this (rms, ln units: about 5%) is not allowed to veto a
#: verdict: deterministic work counts carry lower-order terms (4n - 2 on a chain) that a runs
#: test detects but that cannot turn one growth class into the other; a cache step or a regime
#: change in timings is far larger.
RUNS_MIN_RMS = 0.05


def decisive_lambda(lam: float) -> str:
    """How strong a Lambda is: ``"verdict"`` (>= 10), ``"leaning"`` (4..10) or ``"weak"``."""
    a = abs(lam)
    return "verdict" if a >= LAMBDA_VERDICT else "leaning" if a >= LAMBDA_LEANING else "weak"


# --------------------------------------------------------------------------------------------
# Laws
# --------------------------------------------------------------------------------------------

Features = dict[str, np.ndarray]
CoreFn = Callable[[np.ndarray, Features, bool], tuple[np.ndarray, np.ndarray | None]]


def _features(n: np.ndarray) -> Features:
    n = np.asarray(n, dtype=float)
    u = np.log(n)
    return {"n": n, "u": u, "ell": np.log1p(u)}


@dataclass(frozen=True)
class Law:
    """One candidate growth law ``mu(n) = logaddexp(ln c0, h(n; core))`` on ln cost.

    Parameters
    ----------
    name : str
        Unique name (``"power"``); it is what :class:`LawFit` and :func:`predict` refer to.
    family : {"polynomial", "exponential"}
        The growth class the law belongs to.
    param_names : tuple of str
        Names of the core parameters (the overhead ``log_c0`` is prepended when ``overhead``).
    core : callable
        ``core(theta (B, P), features, jac) -> (h (B, N), dh (B, N, P) or None)``; ``features``
        holds ``n``, ``u = ln n`` and ``ell = ln(1 + ln n)`` as 1-D arrays.
    lower, upper : tuple of float
        Bounds of the core parameters (``-inf``/``inf`` for none).
    starts : callable
        ``starts(features, y) -> array (S, P)`` of starting core parameters.
    quantity : dict
        Maps reported quantities (``"degree"``, ``"base"``, ``"gamma"``) to a core parameter index.
    overhead : bool
        Whether the law carries the overhead ``c0`` (the default laws all do; see
        :meth:`without_overhead`).
    """

    name: str
    family: str
    param_names: tuple[str, ...]
    core: CoreFn
    lower: tuple[float, ...]
    upper: tuple[float, ...]
    starts: Callable[[Features, np.ndarray], np.ndarray]
    quantity: dict[str, int] = field(default_factory=dict)
    overhead: bool = True

    @property
    def all_names(self) -> tuple[str, ...]:
        return (("log_c0",) if self.overhead else ()) + self.param_names

    @property
    def n_params(self) -> int:
        return len(self.all_names)

    def without_overhead(self) -> "Law":
        """The same law with ``c0 = 0`` (named ``name + "_bare"``)."""
        return Law(self.name + "_bare", self.family, self.param_names, self.core, self.lower,
                   self.upper, self.starts, dict(self.quantity), overhead=False)

    def index(self, quantity: str) -> int | None:
        """Index in the full parameter vector of a reported quantity, or None."""
        if quantity not in self.quantity:
            return None
        return self.quantity[quantity] + (1 if self.overhead else 0)

    def mu(self, theta: np.ndarray, feats: Features, jac: bool = False):
        """ln cost (B, N) and optionally its Jacobian (B, N, n_params). O(B * N * P)."""
        theta = np.atleast_2d(theta)
        if not self.overhead:
            return self.core(theta, feats, jac)
        h, dh = self.core(theta[:, 1:], feats, jac)
        g = theta[:, :1]
        mu = np.logaddexp(g, h)
        if not jac:
            return mu, None
        p = np.exp(g - mu)
        J = np.empty(h.shape + (theta.shape[1],))
        J[..., 0] = p
        J[..., 1:] = (1.0 - p)[..., None] * dh
        return mu, J


def _lines(x: np.ndarray, y: np.ndarray) -> list[tuple[float, float]]:
    """Least-squares lines (intercept, slope) through all points and through the top half."""
    out = []
    order = np.argsort(x)
    for idx in (order, order[len(order) // 2:]):
        xs, ys = x[idx], y[idx]
        if len(np.unique(xs)) < 2:
            continue
        slope, intercept = np.polyfit(xs, ys, 1)
        out.append((float(intercept), float(slope)))
    return out or [(float(np.mean(y)), 0.0)]


def _power_core(th, f, jac):
    h = th[:, :1] + th[:, 1:2] * f["u"]
    if not jac:
        return h, None
    J = np.empty(h.shape + (2,))
    J[..., 0] = 1.0
    J[..., 1] = f["u"]
    return h, J


def _power_starts(f, y):
    return np.array(_lines(f["u"], y))


def _nlogn_core(th, f, jac):
    h = th[:, :1] + (f["u"] + f["ell"])
    if not jac:
        return h, None
    return h, np.ones(h.shape + (1,))


def _nlogn_starts(f, y):
    return np.array([[float(np.median(y - f["u"] - f["ell"]))]])


def _powerlog_core(th, f, jac):
    h = th[:, :1] + th[:, 1:2] * f["u"] + th[:, 2:3] * f["ell"]
    if not jac:
        return h, None
    J = np.empty(h.shape + (3,))
    J[..., 0] = 1.0
    J[..., 1] = f["u"]
    J[..., 2] = f["ell"]
    return h, J


def _powerlog_starts(f, y):
    rows = []
    for m in (0.0, 1.0, -1.0):
        for a, k in _lines(f["u"], y - m * f["ell"]):
            rows.append((a, k, m))
    return np.array(rows)


def _exp_core(th, f, jac):
    h = th[:, :1] + th[:, 1:2] * f["n"]
    if not jac:
        return h, None
    J = np.empty(h.shape + (2,))
    J[..., 0] = 1.0
    J[..., 1] = f["n"]
    return h, J


def _exp_starts(f, y):
    return np.array(_lines(f["n"], y))


def _stretched_core(th, f, jac):
    # Box-Cox form a + B (n^gamma - 1) / gamma, i.e. beta = B / gamma: B is the log-log slope at
    # n = 1 and the (B, gamma) valley is far less curved than (beta, gamma), so fits converge fast.
    slope, gamma = th[:, 1:2], th[:, 2:3]
    ng = np.exp(gamma * f["u"])
    bc = (ng - 1.0) / gamma
    h = th[:, :1] + slope * bc
    if not jac:
        return h, None
    J = np.empty(h.shape + (3,))
    J[..., 0] = 1.0
    J[..., 1] = bc
    J[..., 2] = slope * (ng * f["u"] - bc) / gamma
    return h, J


def _stretched_starts(f, y):
    rows = []
    for gamma in (1.0, 0.5, 0.3):
        for a, slope in _lines((np.exp(gamma * f["u"]) - 1.0) / gamma, y):
            rows.append((a, max(slope, 1e-6), gamma))
    return np.array(rows)


INF = math.inf
POWER = Law("power", "polynomial", ("log_a", "k"), _power_core, (-INF, -10.0), (INF, 20.0),
            _power_starts, {"degree": 1})
NLOGN = Law("nlogn", "polynomial", ("log_a",), _nlogn_core, (-INF,), (INF,), _nlogn_starts, {})
POWERLOG = Law("powerlog", "polynomial", ("log_a", "k", "m"), _powerlog_core, (-INF, -10.0, -4.0),
               (INF, 20.0, 4.0), _powerlog_starts, {"degree": 1})
EXPONENTIAL = Law("exponential", "exponential", ("log_a", "ln_b"), _exp_core, (-INF, -INF),
                  (INF, INF), _exp_starts, {"base": 1})
STRETCHED = Law("stretched", "exponential", ("log_a", "slope", "gamma"), _stretched_core,
                (-INF, 1e-9, GAMMA_MIN), (INF, INF, 1.0), _stretched_starts, {"gamma": 2})

#: The laws fitted by default (each with overhead c0 >= 0).
DEFAULT_LAWS: tuple[Law, ...] = (POWER, NLOGN, POWERLOG, EXPONENTIAL, STRETCHED)

_REGISTRY: dict[str, Law] = {}


def register_law(law: Law) -> Law:
    """Make a law (and its bare variant) known to :func:`predict` by name."""
    _REGISTRY[law.name] = law
    bare = law.without_overhead() if law.overhead else law
    _REGISTRY[bare.name] = bare
    return law


for _law in DEFAULT_LAWS:
    register_law(_law)


# --------------------------------------------------------------------------------------------
# Records
# --------------------------------------------------------------------------------------------

def _plain(value: Any) -> Any:
    """JSON-safe copy: tuples -> lists, numpy scalars -> float/int, non-finite floats -> None."""
    if isinstance(value, (tuple, list, np.ndarray)):
        return [_plain(v) for v in value]
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return v if math.isfinite(v) else None
    return value


def _tuple_or_none(v, conv=float):
    return None if v is None else tuple(conv(x) for x in v)


@dataclass(frozen=True)
class LawFit:
    """One fitted candidate law.

    ``sigma`` is the noise scale on ln cost (the maximum-likelihood scale corrected for the
    parameters used, floored at :data:`NOISE_FLOOR`); ``cov`` the covariance of ``params``
    (None when it could not be formed); ``n_points`` the number of points fitted.
    """

    name: str
    params: tuple[float, ...]
    param_names: tuple[str, ...]
    loglik: float
    n_params: int
    sigma: float
    cov: tuple[tuple[float, ...], ...] | None
    family: str = ""
    n_points: int = 0

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "family": self.family, "params": _plain(self.params),
                "param_names": list(self.param_names), "loglik": _plain(self.loglik),
                "n_params": self.n_params, "sigma": _plain(self.sigma),
                "cov": _plain(self.cov), "n_points": self.n_points}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "LawFit":
        cov = d.get("cov")
        return cls(name=d["name"], params=tuple(float(x) for x in d["params"]),
                   param_names=tuple(d["param_names"]),
                   loglik=float(d["loglik"]) if d.get("loglik") is not None else -math.inf,
                   n_params=int(d["n_params"]), sigma=float(d["sigma"]),
                   cov=None if cov is None else tuple(
                       tuple(math.nan if x is None else float(x) for x in row) for row in cov),
                   family=d.get("family", ""), n_points=int(d.get("n_points", 0)))


@dataclass(frozen=True)
class Verdict:
    """The fitter's answer for one curve (see the module docstring for how it is reached).

    ``growth`` is ``"polynomial"``, ``"exponential"`` or ``"inconclusive"``; ``leaning`` names the
    class an inconclusive curve leans to (4 <= |Lambda| < 10, or a verdict downgraded by the
    hold-out check). ``degree`` / ``base`` / ``gamma`` come with 95% intervals; ``base`` is per unit
    of size. ``law`` is the best law of the favoured class, ``n_more_sizes`` the estimated number of
    further sizes needed to separate the classes (None when not computed).
    """

    growth: str
    leaning: str | None
    degree: float | None
    degree_ci: tuple[float, float] | None
    base: float | None
    base_ci: tuple[float, float] | None
    gamma: float | None
    gamma_ci: tuple[float, float] | None
    confidence: float
    lambda_: float
    local_degree: float | None
    local_base: float | None
    next_sizes: tuple[int, ...]
    n_points: int
    n_censored: int
    size_min: float
    size_max: float
    noise: float
    reasons: tuple[str, ...]
    laws: tuple[LawFit, ...]
    law: str | None = None
    n_more_sizes: int | None = None

    def law_fit(self, name: str) -> LawFit | None:
        """The fitted law of that name, or None."""
        for lf in self.laws:
            if lf.name == name:
                return lf
        return None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict; the first keys are those of ``infercost fit --json``."""
        return {
            "curve": None, "growth": self.growth, "degree": _plain(self.degree),
            "degree_ci": _plain(self.degree_ci), "base": _plain(self.base),
            "base_ci": _plain(self.base_ci), "gamma": _plain(self.gamma),
            "gamma_ci": _plain(self.gamma_ci), "confidence": _plain(self.confidence),
            "lambda": _plain(self.lambda_), "local_degree": _plain(self.local_degree),
            "local_base": _plain(self.local_base), "next_sizes": _plain(self.next_sizes),
            "n_points": self.n_points, "leaning": self.leaning, "n_censored": self.n_censored,
            "size_min": _plain(self.size_min), "size_max": _plain(self.size_max),
            "noise": _plain(self.noise), "reasons": list(self.reasons), "law": self.law,
            "n_more_sizes": self.n_more_sizes, "laws": [lf.to_dict() for lf in self.laws],
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Verdict":
        """Inverse of :meth:`to_dict` (the ``curve`` key is ignored)."""
        def opt(key):
            v = d.get(key)
            return None if v is None else float(v)

        lam = d.get("lambda", d.get("lambda_"))
        return cls(
            growth=d["growth"], leaning=d.get("leaning"), degree=opt("degree"),
            degree_ci=_tuple_or_none(d.get("degree_ci")), base=opt("base"),
            base_ci=_tuple_or_none(d.get("base_ci")), gamma=opt("gamma"),
            gamma_ci=_tuple_or_none(d.get("gamma_ci")),
            confidence=float(d.get("confidence", 0.5)),
            lambda_=0.0 if lam is None else float(lam),
            local_degree=opt("local_degree"), local_base=opt("local_base"),
            next_sizes=tuple(int(x) for x in d.get("next_sizes") or ()),
            n_points=int(d.get("n_points", 0)), n_censored=int(d.get("n_censored", 0)),
            size_min=float(d.get("size_min") or 0.0), size_max=float(d.get("size_max") or 0.0),
            noise=float(d.get("noise") or 0.0), reasons=tuple(d.get("reasons") or ()),
            laws=tuple(LawFit.from_dict(x) for x in d.get("laws") or ()),
            law=d.get("law"), n_more_sizes=d.get("n_more_sizes"),
        )


@dataclass(frozen=True, eq=False)
class Prediction:
    """Predicted median cost and a prediction band at ``sizes`` under ``law``."""

    sizes: np.ndarray
    median: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    law: str


# --------------------------------------------------------------------------------------------
# The batched solver
# --------------------------------------------------------------------------------------------

@dataclass
class _Data:
    feats: Features
    y: np.ndarray          # (N,) ln cost (the cap for censored points)
    cens: np.ndarray       # (N,) bool
    n_obs: int

    @property
    def n(self) -> int:
        return len(self.y)


@dataclass
class _BatchFit:
    theta: np.ndarray      # (B, P)
    loglik: np.ndarray     # (B,)
    sigma: np.ndarray      # (B,) maximum-likelihood noise scale (floored)


def _bounds(law: Law, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = list(law.lower), list(law.upper)
    if law.overhead:
        # ln c0 well below the smallest cost means "no overhead"; above the largest is pointless.
        lo = [float(np.min(y)) - 30.0] + lo
        hi = [float(np.max(y)) + 1.0] + hi
    return np.array(lo, dtype=float), np.array(hi, dtype=float)


_LOG_SQRT_2PI = 0.5 * math.log(2 * math.pi)


def _mills(z: np.ndarray) -> np.ndarray:
    """phi(z) / Phi(z), computed in logs so it stays finite far in the lower tail."""
    return np.exp(-0.5 * z * z - _LOG_SQRT_2PI - special.log_ndtr(z))


def _objective(law, theta, data, ys, sigma2):
    """Negative log-likelihood (B,) at noise variance sigma2 (B,) for ln costs ys (B, N)."""
    mu, _ = law.mu(theta, data.feats)
    r = ys - mu
    obs = ~data.cens
    nll = 0.5 * np.sum(np.where(obs, r * r, 0.0), axis=1) / sigma2 \
        + 0.5 * data.n_obs * np.log(2 * np.pi * sigma2)
    if data.cens.any():
        z = -r[:, data.cens] / np.sqrt(sigma2)[:, None]        # (mu - cap) / sigma
        nll = nll - np.sum(special.log_ndtr(z), axis=1)
    return nll, mu


def _solve(law: Law, data: _Data, theta0: np.ndarray, ys: np.ndarray | None = None,
           free: np.ndarray | None = None, max_iter: int = 80) -> _BatchFit:
    """Batched bounded Levenberg–Marquardt (Marquardt scaling) on the (Tobit) likelihood.

    Every row of ``theta0`` is an independent problem (a starting point, a bootstrap replicate,
    a profile-likelihood grid point); ``ys`` optionally gives each row its own ln costs; ``free``
    masks the parameters that move. Uncensored data: plain least squares with the noise scale
    profiled out. Censored data: Gauss–Newton steps on the Tobit likelihood at fixed noise,
    alternated with an EM update of the noise scale.

    Notes
    -----
    O(max_iter * B * N * P**2) array work; a handful of numpy calls per iteration whatever B is,
    which is what makes 200 bootstrap replicates cost about as much as one fit.
    """
    theta = np.array(theta0, dtype=float, copy=True)
    B, P = theta.shape
    lo, hi = _bounds(law, data.y)
    theta = np.clip(theta, lo, hi)
    if ys is None:
        ys = np.broadcast_to(data.y, (B, data.n))
    free = np.ones(P, bool) if free is None else np.asarray(free, bool)
    obs = ~data.cens
    censored = bool(data.cens.any())
    floor2 = NOISE_FLOOR ** 2
    n_obs = max(data.n_obs, 1)

    def sse(mu, yy):
        r = yy - mu
        return np.sum(np.where(obs, r * r, 0.0), axis=1)

    mu, _ = law.mu(theta, data.feats)
    if censored:
        sigma2 = np.maximum(sse(mu, ys) / n_obs, floor2)
        obj, _ = _objective(law, theta, data, ys, sigma2)
    else:
        obj = sse(mu, ys)
        sigma2 = None
    lam = np.full(B, 1e-3)
    active = np.ones(B, bool)
    eye = np.eye(P)
    for _ in range(max_iter):
        # Only the rows still moving are computed: most converge in a few steps, and a
        # replicate that needs 80 should not make the other 199 pay for 80.
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        th, yy, lm, ob = theta[idx], ys[idx], lam[idx], obj[idx]
        s2 = sigma2[idx] if censored else None
        mu, J = law.mu(th, data.feats, jac=True)
        J = J * free
        r = yy - mu
        Jt = np.swapaxes(J, 1, 2)
        if censored:
            s = np.sqrt(s2)[:, None]
            z = (mu - yy) / s                                   # for censored columns
            mills = _mills(z)
            grad_pt = np.where(obs, r / s2[:, None], mills / s)
            w = np.where(obs, 1.0 / s2[:, None], mills * (z + mills) / s2[:, None])
            w = np.maximum(w, 1e-12)
            A = Jt @ (J * w[..., None])
            g = (Jt @ grad_pt[..., None])[..., 0]
        else:
            A = Jt @ J
            g = (Jt @ r[..., None])[..., 0]
        D = np.diagonal(A, axis1=1, axis2=2).copy()
        D = np.maximum(D, 1e-12 * (1.0 + D.max(axis=1, keepdims=True)))
        D[:, ~free] = 1.0
        M = A + (lm[:, None] * D)[:, :, None] * eye
        try:
            delta = np.linalg.solve(M, g[..., None])[..., 0]
        except np.linalg.LinAlgError:
            delta = np.einsum("bpq,bq->bp", np.linalg.pinv(M), g)
        delta[:, ~free] = 0.0
        new = np.clip(th + delta, lo, hi)
        if censored:
            new_obj, _ = _objective(law, new, data, yy, s2)
        else:
            new_obj = sse(law.mu(new, data.feats)[0], yy)
        good = np.isfinite(new_obj) & (new_obj <= ob)
        gain = np.where(good, ob - new_obj, 0.0)
        th = np.where(good[:, None], new, th)
        ob = np.where(good, new_obj, ob)
        lm = np.where(good, np.maximum(lm * 0.3, 1e-9), lm * 8.0)
        if censored:
            # EM step for the noise variance: E[(Y - mu)^2 | Y > cap] = s^2 (1 + a * mills(a)).
            mu_c, _ = law.mu(th, data.feats)
            rr = yy - mu_c
            s = np.sqrt(s2)[:, None]
            a = rr / s                                          # (cap - mu) / s
            tail = _mills(-a)
            extra = np.sum(np.where(data.cens, s2[:, None] * (1.0 + a * tail), 0.0), axis=1)
            new_s2 = np.maximum((np.sum(np.where(obs, rr * rr, 0.0), axis=1) + extra) / data.n,
                                floor2)
            obj2, _ = _objective(law, th, data, yy, new_s2)
            take = obj2 <= ob
            s2 = np.where(take, new_s2, s2)
            gain = gain + np.where(take, ob - obj2, 0.0)
            ob = np.where(take, obj2, ob)
            sigma2[idx] = s2
        theta[idx], obj[idx], lam[idx] = th, ob, lm
        done = (good & (gain <= 1e-9 * (1e-2 + np.abs(ob)))) | (lm > 1e10)
        active[idx[done]] = False
    if censored:
        ll = -obj
        sigma = np.sqrt(sigma2)
    else:
        s2 = np.maximum(obj / n_obs, floor2)
        ll = -0.5 * n_obs * np.log(2 * np.pi * s2) - 0.5 * obj / s2
        sigma = np.sqrt(s2)
    return _BatchFit(theta, ll, sigma)


def _start_matrix(law: Law, data: _Data) -> np.ndarray:
    f = {k: v[~data.cens] for k, v in data.feats.items()}
    y = data.y[~data.cens]
    core = np.atleast_2d(law.starts(f, y))
    if not law.overhead:
        return core
    ymin = float(np.min(y))
    g_none = ymin - 25.0
    rows = [np.concatenate([[g_none], c]) for c in core]
    # Overhead starts: a third / two thirds of the smallest cost is fixed; the growing part is
    # started from the line through the top half.
    for frac in (1 / 3, 2 / 3):
        for c in core[-1:]:
            rows.append(np.concatenate([[ymin + math.log(frac)], c]))
    return np.array(rows)


def _fit_law(law: Law, data: _Data, extra: Sequence[np.ndarray] = (),
             max_iter: int = 60) -> tuple[np.ndarray, float, float]:
    """Best of several starting points (the law's own plus ``extra``): (theta, loglik, ML sigma)."""
    th0 = _start_matrix(law, data)
    if len(extra):
        th0 = np.vstack([th0] + [np.atleast_2d(e) for e in extra])
    res = _solve(law, data, th0, max_iter=max_iter)
    ll = np.where(np.isfinite(res.loglik), res.loglik, -np.inf)
    i = int(np.argmax(ll))
    return res.theta[i], float(ll[i]), float(res.sigma[i])


def _warm_starts(law: Law, raw: dict) -> list[np.ndarray]:
    """Starting points for the 4-parameter laws from the fitted 3-parameter ones."""
    out = []
    if law is POWERLOG and POWER.name in raw:
        out.append(np.append(raw[POWER.name][1], 0.0))
    if law is STRETCHED:
        if EXPONENTIAL.name in raw:
            g, a, s = raw[EXPONENTIAL.name][1]
            out.append(np.array([g, a + s, max(s, 1e-6), 1.0]))   # h = a + s n at gamma = 1
        if POWER.name in raw:
            g, a, k = raw[POWER.name][1]
            out.append(np.array([g, a, max(k, 1e-6), GAMMA_MIN]))  # ~ a + k ln n
    return out


def _information(law: Law, theta: np.ndarray, data: _Data, sigma: float) -> np.ndarray:
    """Expected-information-like matrix J^T W J at theta (Gauss–Newton, Tobit weights)."""
    mu, J = law.mu(theta[None, :], data.feats, jac=True)
    mu, J = mu[0], J[0]
    s2 = sigma * sigma
    w = np.full(data.n, 1.0 / s2)
    if data.cens.any():
        z = (mu - data.y) / sigma
        mills = _mills(z)
        w = np.where(data.cens, np.maximum(mills * (z + mills), 1e-12) / s2, w)
    return J.T @ (w[:, None] * J)


def _make_fit(law: Law, data: _Data, theta, ll, sigma_ml) -> LawFit:
    N, P = data.n, law.n_params
    dof = max(N - P, 1)
    sigma = max(sigma_ml * math.sqrt(N / dof), NOISE_FLOOR)
    cov = None
    try:
        info = _information(law, theta, data, sigma)
        c = np.linalg.pinv(info, rcond=1e-12)
        if np.all(np.isfinite(c)):
            cov = tuple(tuple(float(x) for x in row) for row in c)
    except np.linalg.LinAlgError:
        cov = None
    return LawFit(law.name, tuple(float(x) for x in theta), law.all_names, float(ll), P,
                  float(sigma), cov, law.family, N)


def _aicc(ll: float, p: int, n: int) -> float:
    corr = 2.0 * p * (p + 1) / (n - p - 1) if n - p - 1 > 0 else math.inf
    return -2.0 * ll + 2.0 * p + corr


# --------------------------------------------------------------------------------------------
# Intervals
# --------------------------------------------------------------------------------------------

def _profile_interval(law: Law, data: _Data, theta: np.ndarray, ll_max: float, j: int,
                      cov: tuple | None, level: float = 0.95) -> tuple[float, float]:
    """Profile-likelihood interval for parameter j with F calibration.

    The deviance ``D = 2 (ll_max - ll_profile)`` is compared with
    ``N ln(1 + F_{1, N-P}(level) / (N - P))``, the profile-F threshold of nonlinear least squares
    (Bates & Watts 1988, sec. 6.1) written on the likelihood scale so censored fits use it too.
    Costs one batched solve per widening round (at most 3). O(rounds * G * iter * N * P**2).
    """
    N, P = data.n, law.n_params
    # Degrees of freedom counted on uncensored points only: a censored point carries much less
    # than one point of information, and counting it in full under-covers (seen in calibration).
    dof = max(data.n_obs - P, 1)
    thresh = N * math.log1p(stats.f.ppf(level, 1, dof) / dof)
    lo_b, hi_b = _bounds(law, data.y)
    se = math.nan
    if cov is not None:
        se = math.sqrt(cov[j][j]) if cov[j][j] > 0 else math.nan
    if not math.isfinite(se) or se <= 0:
        se = max(abs(theta[j]) * 0.1, 0.05)
    free = np.ones(P, bool)
    free[j] = False
    ends = [None, None]
    width = 5.0
    for _round in range(3):
        steps = np.concatenate([-np.geomspace(width, 0.05, 14), np.geomspace(0.05, width, 14)])
        grid = np.clip(theta[j] + steps * se, lo_b[j], hi_b[j])
        th0 = np.repeat(theta[None, :], len(grid), axis=0)
        th0[:, j] = grid
        res = _solve(law, data, th0, free=free)
        dev = np.maximum(2.0 * (ll_max - res.loglik), 0.0)
        dev = np.where(np.isfinite(dev), dev, np.inf)
        root = np.sqrt(dev)
        t = math.sqrt(thresh)
        for side, sl in ((0, slice(0, 14)), (1, slice(14, 28))):
            if ends[side] is not None:
                continue
            g, rt = grid[sl], root[sl]
            if side == 0:
                g, rt = g[::-1], rt[::-1]            # walk outwards from the estimate
            prev_g, prev_r = theta[j], 0.0
            for gv, rv in zip(g, rt):
                if rv >= t:
                    frac = (t - prev_r) / (rv - prev_r) if np.isfinite(rv) and rv > prev_r else 1.0
                    ends[side] = float(prev_g + frac * (gv - prev_g))
                    break
                prev_g, prev_r = gv, rv
            if ends[side] is None and (g[-1] <= lo_b[j] or g[-1] >= hi_b[j]):
                ends[side] = float(g[-1])            # open at the parameter bound
        if ends[0] is not None and ends[1] is not None:
            break
        width *= 4.0
    lo = ends[0] if ends[0] is not None else float(theta[j] - width * se)
    hi = ends[1] if ends[1] is not None else float(theta[j] + width * se)
    return (min(lo, theta[j]), max(hi, theta[j]))


def _bootstrap(law: Law, data: _Data, theta: np.ndarray, repeats: list[np.ndarray],
               idx_of_point: np.ndarray, n_boot: int, rng: np.random.Generator) -> np.ndarray:
    """Parameter replicates (n_boot, P) from resampling the raw repeats within each size.

    Each replicate redraws every point's repeats with replacement and takes their median;
    censored points keep their cap. One batched solve warm-started at the full fit:
    O(n_boot * iter * N * P**2) array work.
    """
    ys = np.repeat(data.y[None, :], n_boot, axis=0)
    for i, rep in zip(idx_of_point, repeats):
        rep = np.log(np.asarray(rep, float))
        if len(rep) < 2 or data.cens[i]:
            continue
        draws = rng.integers(0, len(rep), size=(n_boot, len(rep)))
        ys[:, i] = np.median(rep[draws], axis=1)
    th0 = np.repeat(theta[None, :], n_boot, axis=0)
    res = _solve(law, data, th0, ys=ys, max_iter=40)
    return res.theta


# --------------------------------------------------------------------------------------------
# Tests on residuals and design
# --------------------------------------------------------------------------------------------

def runs_test_pvalue(signs: Sequence[bool]) -> float:
    """One-sided exact p-value of too few runs in a sequence of residual signs.

    Wald & Wolfowitz (1940): with n1 positives and n2 negatives, the number of runs R has
    P(R = 2k) = 2 C(n1-1, k-1) C(n2-1, k-1) / C(N, n1) and
    P(R = 2k+1) = [C(n1-1, k-1) C(n2-1, k) + C(n1-1, k) C(n2-1, k-1)] / C(N, n1).
    Few runs mean long stretches on one side of the curve: structure the law misses. O(N).
    """
    s = [bool(x) for x in signs]
    n1, n2 = sum(s), len(s) - sum(s)
    if n1 == 0 or n2 == 0:
        return 1.0
    runs = 1 + sum(1 for a, b in zip(s, s[1:]) if a != b)
    total = math.comb(n1 + n2, n1)
    p = 0
    for r in range(2, runs + 1):
        k = r // 2
        if r % 2 == 0:
            c = 2 * math.comb(n1 - 1, k - 1) * math.comb(n2 - 1, k - 1)
        else:
            c = math.comb(n1 - 1, k - 1) * math.comb(n2 - 1, k) + \
                math.comb(n1 - 1, k) * math.comb(n2 - 1, k - 1)
        p += c
    return p / total


def _mu_var(law: Law, fit: LawFit, n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean ln cost and its delta-method variance at sizes n. O(len(n) * P**2)."""
    theta = np.array(fit.params)
    mu, J = law.mu(theta[None, :], _features(n), jac=True)
    mu, J = mu[0], J[0]
    if fit.cov is None:
        return mu, np.zeros_like(mu)
    cov = np.array(fit.cov)
    cov = np.where(np.isfinite(cov), cov, 0.0)
    var = np.einsum("np,pq,nq->n", J, cov, J)
    return mu, np.maximum(var, 0.0)


def _quantile(level: float, dof: int) -> float:
    return float(stats.t.ppf(0.5 + level / 2.0, max(dof, 1)))


def _next_sizes(lp: Law, fp: LawFit, le: Law, fe: LawFit, sizes: np.ndarray, noise: float,
                cap: float | None, k: int = 3) -> tuple[tuple[int, ...], int | None, float]:
    """T-optimal discriminating sizes (Atkinson & Fedorov 1975) and the sizes still needed.

    Returns (best sizes first, estimated number of further sizes, delta at the best size).
    O(G * P**2) over a candidate grid of G sizes.
    """
    n_min, n_max = float(np.min(sizes)), float(np.max(sizes))
    grid = np.unique(np.round(np.geomspace(max(1.0, n_min), max(n_max * 4.0, n_min + 8), 64)))
    grid = np.array([g for g in grid if g not in set(np.round(sizes))], dtype=float)
    if grid.size == 0:
        return (), None, 0.0
    mp, vp = _mu_var(lp, fp, grid)
    me, ve = _mu_var(le, fe, grid)
    s2 = noise * noise
    crit = (mp - me) ** 2 / (2 * s2 + vp + ve)
    if cap is not None:
        zq = _quantile(0.95, fp.n_points - fp.n_params)
        upper = np.maximum(mp + zq * np.sqrt(vp + s2), me + zq * np.sqrt(ve + s2))
        crit = np.where(upper <= math.log(cap), crit, -np.inf)
    order = np.argsort(-crit)
    chosen: list[float] = []
    for i in order:
        if not np.isfinite(crit[i]):
            break
        if all(abs(math.log(grid[i] / c)) > 0.1 for c in chosen):
            chosen.append(float(grid[i]))
        if len(chosen) == k:
            break
    if not chosen:
        return (), None, 0.0
    best = int(np.argmax(np.where(np.isfinite(crit), crit, -np.inf)))
    delta = float(abs(mp[best] - me[best]))
    n_more = None
    if delta > 0:
        n_more = int(min(999, math.ceil(10.0 / math.log1p(delta * delta / s2))))
    return tuple(int(c) for c in chosen), n_more, delta


# --------------------------------------------------------------------------------------------
# The verdict
# --------------------------------------------------------------------------------------------

def _validate(sizes, costs, censored, repeats):
    try:
        n = np.asarray(sizes, dtype=float).ravel()
        y = np.asarray(costs, dtype=float).ravel()
    except (TypeError, ValueError) as exc:
        raise InputError(f"fit_growth: sizes and costs: expected numbers, got {exc}") from exc
    if n.shape != y.shape:
        raise InputError(f"fit_growth: costs: expected {n.size} values (one per size), "
                         f"got {y.size}")
    for name, arr in (("sizes", n), ("costs", y)):
        bad = ~np.isfinite(arr)
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"fit_growth: {name}[{i}]: expected a finite number, got {arr[i]!r}")
    if (n < 1).any():
        i = int(np.argmax(n < 1))
        raise InputError(f"fit_growth: sizes[{i}]: expected a size >= 1, got {n[i]!r}")
    if (y <= 0).any():
        i = int(np.argmax(y <= 0))
        raise InputError(f"fit_growth: costs[{i}]: expected a cost > 0, got {y[i]!r}")
    if censored is None:
        c = np.zeros(n.shape, bool)
    else:
        c = np.asarray(censored).ravel()
        if c.shape != n.shape:
            raise InputError(f"fit_growth: censored: expected {n.size} flags, got {c.size}")
        c = c.astype(bool)
    reps = None
    if repeats is not None:
        if len(repeats) != n.size:
            raise InputError(f"fit_growth: repeats: expected {n.size} sequences (one per point), "
                             f"got {len(repeats)}")
        reps = []
        for i, r in enumerate(repeats):
            arr = np.asarray(r if r is not None else [], dtype=float).ravel()
            if arr.size and (~np.isfinite(arr) | (arr <= 0)).any():
                raise InputError(f"fit_growth: repeats[{i}]: expected positive finite costs, "
                                 f"got {arr.tolist()!r}")
            reps.append(arr)
    return n, y, c, reps


def _degenerate(n, y, c, reasons, next_sizes=()) -> Verdict:
    return Verdict("inconclusive", None, None, None, None, None, None, None, 0.5, 0.0, None,
                   None, tuple(next_sizes), int(n.size), int(c.sum()),
                   float(n.min()) if n.size else 0.0, float(n.max()) if n.size else 0.0,
                   0.0, tuple(reasons), ())


def _extend_sizes(n: np.ndarray) -> tuple[int, ...]:
    """Geometric sizes that bring a too-short curve to an 8x range and 6 sizes."""
    if n.size == 0:
        return ()
    lo, hi = float(n.min()), float(n.max())
    target = max(hi * 2.0, lo * 8.0)
    cand = np.unique(np.round(np.geomspace(hi, target, 5)[1:]).astype(int))
    return tuple(int(x) for x in cand if x > hi)


def _ci_from(law, data, theta, ll, fit, j, transform):
    lo, hi = _profile_interval(law, data, theta, ll, j, fit.cov)
    return (_safe(transform, lo, math.inf), _safe(transform, hi, math.inf))


def _safe(transform, value, overflow):
    """``transform(value)``, or ``overflow`` when it overflows: an interval bound beyond float
    range (a poorly determined base) is reported as unbounded, not as a crash."""
    try:
        return transform(value)
    except OverflowError:
        return overflow


def fit_growth(sizes, costs, censored=None, *, repeats=None, laws: Sequence[Law] = DEFAULT_LAWS,
               cap: float | None = None, intervals: bool = True, seed: int = 0,
               n_boot: int = 200) -> Verdict:
    """Classify the growth of cost with size as polynomial, exponential or inconclusive.

    Parameters
    ----------
    sizes : array_like of float, shape (N,)
        Sizes, each >= 1 (repeated sizes are allowed).
    costs : array_like of float, shape (N,)
        Positive costs (time or work); for a censored point, the cap it hit.
    censored : array_like of bool, shape (N,), optional
        True where the cost is only a lower bound.
    repeats : sequence of array_like, optional
        Raw repeated costs of each point (its ``costs`` entry should be their median). When given,
        intervals also use a bootstrap that resamples repeats within each size.
    laws : sequence of Law
        Candidate laws; must include at least one polynomial and one exponential law. The first of
        each class with a ``degree`` (resp. ``base``) quantity is the class's 3-parameter
        representative; ``powerlog``/``stretched`` are the 4-parameter pair.
    cap : float, optional
        Cost limit for a new point; suggested next sizes keep the pessimistic (upper 95%)
        predicted cost within it. Defaults to the smallest censored cap, if any.
    intervals : bool
        Compute 95% intervals for degree, base and gamma.
    seed : int
        Seed of the bootstrap.
    n_boot : int
        Bootstrap replicates (used only with ``repeats``).

    Returns
    -------
    Verdict

    Raises
    ------
    InputError
        NaN, inf, non-positive costs, sizes below 1, or mismatched lengths.

    Examples
    --------
    >>> import numpy as np
    >>> n = np.array([4, 6, 8, 12, 16, 24, 32, 48, 64])
    >>> v = fit_growth(n, 3.0 * n ** 2.0)
    >>> v.growth, round(v.degree, 2)
    ('polynomial', 2.0)

    Notes
    -----
    Cost: about a dozen batched Levenberg–Marquardt solves of O(iter * B * N * P**2) each
    (B starting points, profile grid points or bootstrap replicates); roughly 20-60 ms per curve
    of 12 points with intervals.
    """
    from model_zoo.base import make_rng

    n, y_raw, c, reps = _validate(sizes, costs, censored, repeats)
    laws = tuple(laws)
    for law in laws:
        register_law(law)
    reasons: list[str] = []
    if n.size == 0:
        return _degenerate(n, y_raw, c, ["no points"])
    n_distinct = len(np.unique(n))
    n_unc_sizes = len(np.unique(n[~c]))
    if c.all():
        return _degenerate(n, y_raw, c, ["every point is censored: the cost is only known to be "
                                         "above the caps"])
    if n_distinct < 4:
        return _degenerate(n, y_raw, c, [f"only {n_distinct} distinct sizes; at least 4 are "
                                         f"needed to fit a growth law"], _extend_sizes(n))
    if n_unc_sizes < 3:
        return _degenerate(n, y_raw, c, [f"only {n_unc_sizes} uncensored sizes; at least 3 are "
                                         f"needed to fit"], ())
    if cap is None and c.any():
        cap = float(np.min(y_raw[c]))

    y = np.log(y_raw)
    data = _Data(_features(n), y, c, int((~c).sum()))
    N = data.n

    poly3 = next(l for l in laws if l.family == "polynomial" and "degree" in l.quantity)
    exp3 = next(l for l in laws if l.family == "exponential" and "base" in l.quantity)
    poly4 = next((l for l in laws if l.family == "polynomial" and l.n_params == 4), None)
    exp4 = next((l for l in laws if l.family == "exponential" and "gamma" in l.quantity), None)

    raw: dict[str, tuple[Law, np.ndarray, float, float]] = {}
    for law in sorted(laws, key=lambda l: l.n_params):     # 3-parameter fits seed the 4s
        if law.n_params >= N:
            continue
        raw[law.name] = (law,) + _fit_law(law, data, _warm_starts(law, raw))
    # Bare variants (c0 = 0) of the two 3-parameter representatives: is c0 needed? (AICc)
    for law in (poly3, exp3):
        if law.overhead:
            bare = law.without_overhead()
            theta, ll, sig = _fit_law(bare, data)
            raw[bare.name] = (bare, theta, ll, sig)
    fits = {name: _make_fit(law, data, th, ll, sg) for name, (law, th, ll, sg) in raw.items()}

    def ll_of(name):
        return raw[name][2] if name in raw else -math.inf

    # Within the exponential class: is gamma < 1 supported? Boundary LRT: the null value gamma=1
    # sits on the edge of the parameter space, so the reference is 0.5 chi2_0 + 0.5 chi2_1.
    stretched_ok = False
    if exp4 is not None and exp4.name in raw and poly4 is not None and poly4.name in raw:
        d = 2.0 * (ll_of(exp4.name) - ll_of(exp3.name))
        gamma_hat = raw[exp4.name][1][exp4.index("gamma")]
        stretched_ok = d > stats.chi2.ppf(0.90, 1) and gamma_hat < 0.95
    if stretched_ok:
        lp_name, le_name = poly4.name, exp4.name
    else:
        lp_name, le_name = poly3.name, exp3.name
    lam = 2.0 * (ll_of(lp_name) - ll_of(le_name))
    if not math.isfinite(lam):
        lam = 0.0
    favoured = "polynomial" if lam > 0 else "exponential"
    strength = decisive_lambda(lam)

    # Within each class: the reported law (c0 or not by AICc).
    def pick(law3: Law) -> str:
        bare = law3.without_overhead().name if law3.overhead else law3.name
        if bare in raw and law3.name in raw:
            a_bare = _aicc(ll_of(bare), raw[bare][0].n_params, N)
            a_full = _aicc(ll_of(law3.name), law3.n_params, N)
            return bare if a_bare <= a_full else law3.name
        return law3.name if law3.name in raw else bare

    # Degree and base are read off the laws with c0: choosing the bare law by AICc first and then
    # quoting its interval ignores the selection and under-covers when a small overhead exists.
    p_name, e_name = poly3.name, exp3.name
    c0_note = {p_name: pick(poly3) == p_name, e_name: pick(exp3) == e_name}
    # The favoured law for prediction, residuals and the hold-out check: c0 or not by AICc (the
    # bare law's covariance is well defined when c0 sits at its bound of 0).
    if favoured == "exponential" and stretched_ok:
        best_name = exp4.name
    elif favoured == "exponential":
        best_name = pick(exp3)
    else:
        best_name = pick(poly3)
    noise_fit = fits[lp_name] if lam > 0 else fits[le_name]
    noise = max(noise_fit.sigma, NOISE_FLOOR)

    # Flat or decreasing cost, decided on the bare power law (with c0 a flat cost leaves the
    # degree undetermined: c0 explains everything).
    flat_name = poly3.without_overhead().name if poly3.overhead else poly3.name
    fl, fth, fll, _ = raw[flat_name]
    jf = fl.index("degree")
    if c.any() or fits[flat_name].cov is None:
        flat_ci = _ci_from(fl, data, fth, fll, fits[flat_name], jf, float)
    else:
        # The bare power law is linear on log-log axes: its exact t interval, no profile needed.
        half = _quantile(0.95, N - fl.n_params) * math.sqrt(max(fits[flat_name].cov[jf][jf], 0))
        flat_ci = (float(fth[jf] - half), float(fth[jf] + half))
    flat = flat_ci[0] >= -FLAT_DEGREE and flat_ci[1] <= FLAT_DEGREE
    decreasing = flat_ci[1] < 0 and not flat
    pl, pth, pll, _ = raw[p_name]
    jdeg = pl.index("degree")
    if flat:
        pl, pth, pll, p_name, jdeg = fl, fth, fll, flat_name, jf
    degree = float(pth[jdeg])
    degree_ci = None

    growth = "inconclusive"
    leaning = None
    forced: list[str] = []
    rng_ratio = float(n.max() / n.min())
    if rng_ratio < MIN_RANGE:
        forced.append(f"sizes span only {rng_ratio:.2g}x (n_max / n_min); at least "
                      f"{MIN_RANGE:g}x is needed to tell polynomial from exponential")
    if n_unc_sizes < MIN_UNCENSORED:
        forced.append(f"only {n_unc_sizes} uncensored sizes; at least {MIN_UNCENSORED} are needed "
                      f"for a verdict")
    if noise > NOISE_LIMIT:
        forced.append(f"noise {noise:.2f} on ln cost exceeds {NOISE_LIMIT:g}")
    # Runs test on the residuals in size order: structure counts only when no law of the
    # favoured class is free of it (a class is as good as its best-fitting member; n log n or
    # a power with overhead may absorb what the bare power law leaves).
    ns = n[~c]
    us = np.unique(ns)
    runs_p, resid_rms = 0.0, math.inf
    favoured_family = raw[best_name][0].family
    for law_name, (bl, bth, _, _) in raw.items():
        if bl.family != favoured_family:
            continue
        mu_b, _ = bl.mu(bth[None, :], data.feats)
        resid = (y - mu_b[0])[~c]
        mean_res = np.array([resid[ns == v].mean() for v in us])
        nz = np.abs(mean_res) > 1e-12
        law_p = runs_test_pvalue(mean_res[nz] > 0) if nz.sum() >= 6 else 1.0
        law_rms = float(np.sqrt(np.mean(resid ** 2))) if resid.size else 0.0
        if law_p >= RUNS_ALPHA or law_rms <= RUNS_MIN_RMS:
            runs_p, resid_rms = max(runs_p, law_p), min(resid_rms, law_rms)
            break
        runs_p, resid_rms = max(runs_p, law_p), min(resid_rms, law_rms)
    if runs_p < RUNS_ALPHA and resid_rms > RUNS_MIN_RMS and not flat:
        forced.append(f"residuals of the {best_name} law show structure (runs test p = "
                      f"{runs_p:.3f}): a regime change such as a cache step?")

    if decreasing:
        reasons.append(f"cost decreases with size (degree {fth[jf]:.2f} "
                       f"[{flat_ci[0]:.2f}, {flat_ci[1]:.2f}])")
    elif flat and not forced:
        growth = "polynomial"
        best_name = p_name
        degree_ci = flat_ci
        reasons.append(f"cost is flat over the range: degree {degree:.2f} with 95% interval "
                       f"inside +-{FLAT_DEGREE:g} (a constant is polynomial of degree 0)")
    elif forced:
        reasons.extend(forced)
    elif strength == "verdict":
        growth = favoured
    elif strength == "leaning":
        leaning = favoured
        reasons.append(f"|Lambda| = {abs(lam):.1f} is between {LAMBDA_LEANING:g} and "
                       f"{LAMBDA_VERDICT:g}: leaning {favoured}")
    else:
        reasons.append(f"|Lambda| = {abs(lam):.1f} < {LAMBDA_LEANING:g}: the data do not tell "
                       f"polynomial from exponential")
    if forced and flat and not decreasing:
        reasons.extend(forced)

    # Hold-out check: refit the favoured law without the largest quarter of sizes.
    if growth != "inconclusive" or leaning is not None:
        msg = _holdout(raw[best_name][0], data, n)
        if msg:
            reasons.append(msg)
            if growth != "inconclusive":
                leaning, growth = growth, "inconclusive"
            else:
                leaning = None

    # Reported quantities.
    base = base_ci = gamma = gamma_ci = None
    el, eth, ell_, _ = raw[e_name]
    jb = el.index("base")
    show_poly = growth == "polynomial" or growth == "inconclusive"
    show_exp = growth == "exponential" or (growth == "inconclusive" and not decreasing)
    if show_exp:
        base = _safe(math.exp, eth[jb], math.inf)
        if intervals:
            base_ci = _ci_from(el, data, eth, ell_, fits[e_name], jb, math.exp)
        if stretched_ok:
            sl, sth, sll, _ = raw[exp4.name]
            jg = sl.index("gamma")
            gamma = float(sth[jg])
            if intervals:
                gamma_ci = _ci_from(sl, data, sth, sll, fits[exp4.name], jg, float)
            if growth == "exponential":
                reasons.append(f"stretched exponential exp(beta n^gamma) with gamma {gamma:.2f}: "
                               f"the base per unit is not constant (see local_base)")
                base = base_ci = None
    if not show_poly:
        degree = None
        degree_ci = None
    elif not intervals:
        degree_ci = None
    elif degree_ci is None:
        degree_ci = _ci_from(pl, data, pth, pll, fits[p_name], jdeg, float)

    if reps is not None and intervals and any(len(r) >= 2 for r in reps):
        rng = make_rng(seed, "bootstrap")
        idx = np.arange(N)
        if degree is not None and degree_ci is not None:
            b = _bootstrap(pl, data, pth, reps, idx, n_boot, rng)[:, jdeg]
            degree_ci = (min(degree_ci[0], float(np.quantile(b, 0.025))),
                         max(degree_ci[1], float(np.quantile(b, 0.975))))
        if base is not None and base_ci is not None:
            b = np.exp(_bootstrap(el, data, eth, reps, idx, n_boot, rng)[:, jb])
            base_ci = (min(base_ci[0], float(np.quantile(b, 0.025))),
                       max(base_ci[1], float(np.quantile(b, 0.975))))

    # Local degree and base at the largest size, from the favoured law.
    ll_law, lth, _, _ = raw[best_name]
    nmax = float(n.max())
    probe = np.array([nmax * (1 - 1e-4), nmax * (1 + 1e-4), nmax, nmax + 1.0])
    m, _ = ll_law.mu(lth[None, :], _features(probe))
    m = m[0]
    local_degree = float((m[1] - m[0]) / (math.log(probe[1]) - math.log(probe[0])))
    local_base = float(_safe(math.exp, m[3] - m[2], math.inf))

    next_sizes, n_more, _delta = _next_sizes(raw[lp_name][0], fits[lp_name], raw[le_name][0],
                                             fits[le_name], n, noise, cap)
    if n_more is not None and growth == "inconclusive" and not decreasing:
        reasons.append(f"about {n_more} more sizes near {', '.join(map(str, next_sizes))} "
                       f"would separate the laws (Atkinson-Fedorov design)")
    if growth != "inconclusive" and c0_note.get(best_name):
        reasons.append(f"a fixed overhead c0 = {math.exp(raw[best_name][1][0]):.3g} is supported "
                       f"(AICc against c0 = 0)")
    if c.any():
        reasons.append(f"{int(c.sum())} censored points entered as lower bounds (Tobit)")
    if growth == "polynomial" and not flat and NLOGN.name in raw and pl.name in raw:
        if _aicc(ll_of(NLOGN.name), NLOGN.n_params, N) < _aicc(pll, pl.n_params, N) - 2:
            reasons.append("n log n describes the cost better than a pure power law")

    if growth != "inconclusive":
        confidence = 0.95 if flat else 1.0 / (1.0 + math.exp(-abs(lam) / 2.0))
    elif leaning is not None:
        confidence = 1.0 / (1.0 + math.exp(-abs(lam) / 2.0))
    else:
        confidence = 0.5
    chosen_law = best_name if (growth != "inconclusive" or leaning is not None) else None

    return Verdict(
        growth=growth, leaning=leaning, degree=degree, degree_ci=degree_ci, base=base,
        base_ci=base_ci, gamma=gamma, gamma_ci=gamma_ci, confidence=float(confidence),
        lambda_=float(lam), local_degree=local_degree, local_base=local_base,
        next_sizes=next_sizes, n_points=int(N), n_censored=int(c.sum()),
        size_min=float(n.min()), size_max=nmax, noise=float(noise), reasons=tuple(reasons),
        laws=tuple(fits.values()), law=chosen_law, n_more_sizes=n_more,
    )


def _holdout(law: Law, data: _Data, n: np.ndarray, level: float = 0.95) -> str | None:
    """Refit without the largest quarter of sizes; a sentence when they fall outside the band."""
    us = np.unique(n)
    k = max(1, int(math.ceil(len(us) / 4)))
    keep = n < us[-k]
    if len(np.unique(n[keep & ~data.cens])) <= law.n_params or (keep & ~data.cens).sum() <= law.n_params:
        return None
    sub = _Data({kk: v[keep] for kk, v in data.feats.items()}, data.y[keep], data.cens[keep],
                int((keep & ~data.cens).sum()))
    theta, ll, sig = _fit_law(law, sub)
    fit = _make_fit(law, sub, theta, ll, sig)
    held = ~keep
    mu, var = _mu_var(law, fit, n[held])
    # Simultaneous band over the held-out points (Bonferroni): a 95% band per point would
    # downgrade a correct law for one of k points about k * 5% of the time.
    q = _quantile(1.0 - (1.0 - level) / max(int(held.sum()), 1), fit.n_points - fit.n_params)
    # Plus a 10% allowance: lower-order terms (an n^2 part of an n^3 kernel) move very precise
    # work counts by a few per cent; the check is after regime changes and wrong classes.
    half = q * np.sqrt(var + fit.sigma ** 2) + HOLDOUT_ALLOWANCE
    yh = data.y[held]
    ch = data.cens[held]
    outside = np.where(ch, yh > mu + half, np.abs(yh - mu) > half)
    if outside.any():
        bad = sorted(set(int(v) if float(v).is_integer() else float(v) for v in n[held][outside]))
        return (f"hold-out check: refitted without the largest {k} sizes, the {law.name} law "
                f"misses size(s) {bad} (outside the simultaneous {level:.0%} prediction band); "
                f"downgraded")
    return None


# --------------------------------------------------------------------------------------------
# Prediction
# --------------------------------------------------------------------------------------------

def _law_named(name: str, laws: Sequence[Law] = ()) -> Law:
    for law in laws:
        if law.name == name:
            return law
        if law.overhead and law.without_overhead().name == name:
            return law.without_overhead()
    if name in _REGISTRY:
        return _REGISTRY[name]
    raise InputError(f"predict: law: expected one of {sorted(_REGISTRY)}, got {name!r}")


def _default_law(verdict: Verdict) -> str:
    if verdict.law is not None:
        return verdict.law
    if not verdict.laws:
        raise InputError("predict: verdict: expected fitted laws, got a verdict without any "
                         f"({'; '.join(verdict.reasons)})")
    main = [lf for lf in verdict.laws if lf.name in ("power", "exponential", "power_bare",
                                                        "exponential_bare")] or list(verdict.laws)
    return max(main, key=lambda lf: lf.loglik).name


def predict(verdict: Verdict, sizes, *, law: str | None = None, level: float = 0.95,
            laws: Sequence[Law] = ()) -> Prediction:
    """Predicted median cost with a prediction band at ``sizes``.

    The band is ``mu +- t_{N-P} * sqrt(Var mu + sigma**2)`` on ln cost: parameter uncertainty by
    the delta method plus the noise of a new point. ``law`` None takes the favoured class's best
    law (or, for an inconclusive verdict without a leaning, the better fitting of power and
    exponential). O(len(sizes) * P**2).

    Raises
    ------
    InputError
        Unknown law, a verdict without fitted laws, or sizes below 1.
    """
    name = law or _default_law(verdict)
    fit = verdict.law_fit(name)
    if fit is None:
        raise InputError(f"predict: law: expected one of {[lf.name for lf in verdict.laws]}, "
                         f"got {name!r}")
    lw = _law_named(name, laws)
    n = np.atleast_1d(np.asarray(sizes, dtype=float))
    if (~np.isfinite(n) | (n < 1)).any():
        raise InputError(f"predict: sizes: expected finite sizes >= 1, got {n.tolist()!r}")
    mu, var = _mu_var(lw, fit, n)
    q = _quantile(level, fit.n_points - fit.n_params)
    half = q * np.sqrt(var + fit.sigma ** 2)
    return Prediction(n, np.exp(mu), np.exp(mu - half), np.exp(mu + half), name)


def largest_feasible_size(verdict: Verdict, limit_cost: float, *, level: float = 0.95,
                          law: str | None = None, upper: bool = True) -> float | None:
    """Largest size whose predicted cost (upper band when ``upper``) stays within ``limit_cost``.

    Returns None when even size 1 exceeds the limit and ``math.inf`` when the cost stays under
    it up to 1e12. Bracketing then bisection on a continuous size: O(60 * P**2).
    """
    if not (limit_cost > 0 and math.isfinite(limit_cost)):
        raise InputError(f"largest_feasible_size: limit_cost: expected a positive finite cost, "
                         f"got {limit_cost!r}")

    def cost(x: float) -> float:
        p = predict(verdict, [x], law=law, level=level)
        return float((p.upper if upper else p.median)[0])

    if cost(1.0) > limit_cost:
        return None
    lo, hi = 1.0, 2.0
    while cost(hi) <= limit_cost:
        lo, hi = hi, hi * 2.0
        if hi > 1e12:
            return math.inf
    for _ in range(60):
        mid = math.sqrt(lo * hi)
        if cost(mid) <= limit_cost:
            lo = mid
        else:
            hi = mid
        if hi / lo < 1 + 1e-9:
            break
    return float(lo)
