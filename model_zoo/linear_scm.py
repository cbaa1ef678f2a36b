"""Linear-Gaussian structural causal models, answered in closed form at all three levels.

The model is ``X = B X + U`` with ``U ~ N(mu, diag(sigma^2))`` and ``B`` strictly lower-triangular
in topological order, so ``X = L^{-1} U`` with the unit lower-triangular ``L = I - B``. Every
variable is jointly Gaussian with the noise, so each query has a closed form:

* **associational** ``E[Y | E=e]`` and ``P(Y > t | E=e)``: condition the joint Gaussian of
  ``(X_E, Y)`` on the evidence;
* **interventional** ``E[Y | do(X_I=x), E=e]``: the same in the *mutilated* model (rows ``I`` of
  ``B`` zeroed, ``X_I`` fixed at ``x``);
* **counterfactual** ``E[Y_{X_I=x} | E=e]``: abduction (the posterior of ``U`` given the factual
  evidence, Gaussian because ``X_E`` is linear in ``U``), action (mutilate), prediction (push the
  posterior of ``U`` through the mutilated system) — Pearl, Glymour & Jewell 2016, §4.2.

The engine never forms an inverse: rows of ``L^{-1}`` come from triangular solves
(:func:`scipy.linalg.solve_triangular`) and the evidence covariance is factored once by Cholesky
(:func:`scipy.linalg.cho_factor`). Only the *ancestral set* of the variables a query mentions
enters the algebra (the noise of any other variable is independent of the evidence and does not
reach the target), so a query on ``a`` relevant variables with ``m`` evidence variables costs
``O(m a^2 + a m^2 + m^3)`` flops, at most cubic in the number of variables.

Because the posterior covariance does not depend on the evidence *values*, queries that share the
target, the evidence variables and the intervened variables share one *plan*: the conditional
mean is affine in the evidence and intervention values (``const + beta.e + gamma.x``) and the
conditional variance is one number. :meth:`LinearSCMFamily.answer_batch` solves each group once
and evaluates all its rows with one matrix-vector product.

Work unit
---------
``Answer.work`` is the number of floating-point operations of the linear algebra the engine
performed, counted per operation as (``a`` relevant variables, ``k`` right-hand sides, ``m``
evidence variables, ``p`` intervened variables):

====================================  =================
operation                             flops
====================================  =================
triangular solve, ``k`` right sides   ``k a^2``
matrix product ``(r x c)(c x k)``     ``2 r c k``
dot product of length ``c``           ``2 c``
diagonal scaling of ``a x k``         ``a k``
Cholesky of ``m x m``                 ``m^3 / 3``
Cholesky solve, ``k`` right sides     ``2 m^2 k``
one evidence row of a plan            ``2 (m + p)`` (+3 for the normal tail of an exceedance)
====================================  =================

Building the ancestral set and gathering the dense ``a x a`` block of ``L`` are memory
operations, not flops, and are not counted. In a batch the plan's flops are shared evenly among
the queries of its group, so a batched answer's work is less than a single answer's.

File format (``format_version`` 1)
----------------------------------
One JSON object::

    {"family": "linear_scm", "format_version": 1,
     "variables": [{"name": "X", "parents": {}, "noise_mean": 0.0, "noise_variance": 1.0},
                   {"name": "H", "parents": {"X": 0.5}}, ...]}

``parents`` maps parent names to coefficients (default ``{}``); ``noise_mean`` defaults to 0 and
``noise_variance`` to 1 and must be > 0. The order of ``variables`` need not be topological (it is
sorted, ties kept in file order); a cycle, an unknown parent, a duplicate name, a non-numeric or
non-finite number, or an unknown key is an :class:`~model_zoo.errors.InputError` naming the file
and the field. See ``docs/formats/linear_scm.md``.

References
----------
Pearl, J., Glymour, M. and Jewell, N. P. (2016). *Causal Inference in Statistics: A Primer*.
Wiley. §4.2.3 (linear counterfactuals), §4.2.4 (abduction, action, prediction).
Balke, A. and Pearl, J. (1994). Probabilistic evaluation of counterfactual queries. AAAI.
(twin network, used by the independent reference).
Golub, G. H. and Van Loan, C. F. (2013). *Matrix Computations*, 4th ed., §3.1, §4.2 (flop counts
of triangular solves and Cholesky).
"""

from __future__ import annotations

import json
import math
import pathlib
from dataclasses import dataclass, field
from typing import Any, ClassVar, Sequence

import numpy as np

from model_zoo.base import Answer, FamilyBase, Level, Query, Size, make_rng, register
from model_zoo.errors import InputError, UnsupportedQuery

__all__ = [
    "LinearSCM",
    "LinearSCMFamily",
    "make_linear_scm",
    "load_linear_scm",
    "dump_linear_scm",
    "closed_form_reference",
    "monte_carlo_reference",
    "FORMAT_VERSION",
]

FORMAT_VERSION = 1
#: Relative posterior variance below which the target is treated as determined by the evidence
#: (the subtraction prior - explained carries rounding of order cond * eps, far below this).
_DEGENERATE_RELATIVE_VARIANCE = 1e-10
_KINDS = ("expectation", "exceedance")


# ----------------------------------------------------------------------------------------------
# the instance
# ----------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class LinearSCM:
    """A linear-Gaussian SCM with variables in topological order.

    Attributes
    ----------
    names
        Variable names; index ``i`` is the ``i``-th in topological order.
    parents
        ``parents[i]``: sorted integer indices (all ``< i``) of the parents of variable ``i``.
    coefficients
        ``coefficients[i][j]``: the coefficient of ``parents[i][j]`` in the mechanism of ``i``.
    noise_mean, noise_variance
        Mean and variance (> 0) of each exogenous ``U_i``.
    size, topology, seed, name
        How the instance was made (``topology`` is ``"file"`` for a loaded model).
    """

    names: tuple[str, ...]
    parents: tuple[np.ndarray, ...]
    coefficients: tuple[np.ndarray, ...]
    noise_mean: np.ndarray
    noise_variance: np.ndarray
    size: Size
    topology: str
    seed: int
    name: str
    index: dict[str, int] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "index", {v: i for i, v in enumerate(self.names)})
        for arr in (*self.parents, *self.coefficients, self.noise_mean, self.noise_variance):
            arr.setflags(write=False)

    @property
    def n_variables(self) -> int:
        return len(self.names)

    @property
    def n_edges(self) -> int:
        return int(sum(len(p) for p in self.parents))

    def dense_coefficients(self) -> np.ndarray:
        """The ``n x n`` matrix ``B`` (``B[i, j]`` = coefficient of ``X_j`` in ``X_i``); O(n^2) memory."""
        n = self.n_variables
        b = np.zeros((n, n))
        for i, (pa, co) in enumerate(zip(self.parents, self.coefficients)):
            b[i, pa] = co
        return b


def make_linear_scm(names: Sequence[str], parents: Sequence[dict[str, float]],
                    noise_mean: Sequence[float], noise_variance: Sequence[float], *,
                    name: str = "linear_scm", topology: str = "custom", seed: int = 0,
                    where: str = "linear_scm") -> LinearSCM:
    """Build a :class:`LinearSCM` from per-variable parent dictionaries in any order.

    Parameters
    ----------
    names
        Variable names (unique).
    parents
        ``parents[i]`` maps each parent name of ``names[i]`` to its coefficient.
    noise_mean, noise_variance
        Per-variable noise mean and variance (> 0).
    where
        Prefix of error messages (the file name when loading).

    Returns
    -------
    LinearSCM
        Variables sorted topologically, ties kept in the given order.

    Raises
    ------
    InputError
        Duplicate or unknown names, a cycle, non-finite numbers, variance <= 0.

    Notes
    -----
    O(n + edges) (Kahn's algorithm with a heap keyed by input position).

    Examples
    --------
    >>> scm = make_linear_scm(["Y", "X"], [{"X": 0.5}, {}], [0, 0], [1, 1])
    >>> scm.names
    ('X', 'Y')
    """
    import heapq

    names = list(names)
    n = len(names)
    if n == 0:
        raise InputError.at(where, "variables", "at least one variable", [])
    pos: dict[str, int] = {}
    for i, v in enumerate(names):
        if not isinstance(v, str) or not v:
            raise InputError.at(where, f"variables[{i}].name", "a non-empty string", v)
        if v in pos:
            raise InputError.at(where, f"variables[{i}].name", "a name not used before", v)
        pos[v] = i
    if len(parents) != n or len(noise_mean) != n or len(noise_variance) != n:
        raise InputError(f"{where}: expected one parents/noise entry per variable")
    means = np.array([_finite(noise_mean[i], where, f"variables[{i}].noise_mean") for i in range(n)])
    varis = np.array([_finite(noise_variance[i], where, f"variables[{i}].noise_variance")
                      for i in range(n)])
    for i, s2 in enumerate(varis):
        if not s2 > 0:
            raise InputError.at(where, f"variables[{i}].noise_variance", "a number > 0", float(s2))
    children: list[list[int]] = [[] for _ in range(n)]
    n_missing = [0] * n
    for i, pa in enumerate(parents):
        if not isinstance(pa, dict):
            raise InputError.at(where, f"variables[{i}].parents", "an object {parent: coefficient}", pa)
        for p, c in pa.items():
            if p not in pos:
                raise InputError.at(where, f"variables[{i}].parents", "names of declared variables", p)
            _finite(c, where, f"variables[{i}].parents.{p}")
            children[pos[p]].append(i)
            n_missing[i] += 1
    heap = [i for i in range(n) if n_missing[i] == 0]
    heapq.heapify(heap)
    order: list[int] = []
    while heap:
        i = heapq.heappop(heap)
        order.append(i)
        for c in children[i]:
            n_missing[c] -= 1
            if n_missing[c] == 0:
                heapq.heappush(heap, c)
    if len(order) < n:
        import networkx as nx

        g = nx.DiGraph([(p, names[i]) for i, pa in enumerate(parents) for p in pa])
        cycle = " -> ".join([u for u, _ in nx.find_cycle(g)] + [nx.find_cycle(g)[0][0]])
        raise InputError(f"{where}: variables: expected an acyclic graph, "
                         f"got the cycle {cycle}")
    new = {names[old]: k for k, old in enumerate(order)}
    par_arrays, coef_arrays = [], []
    for old in order:
        items = sorted((new[p], float(c)) for p, c in parents[old].items())
        par_arrays.append(np.array([j for j, _ in items], dtype=np.intp))
        coef_arrays.append(np.array([c for _, c in items], dtype=float))
    max_in = max((len(p) for p in par_arrays), default=0)
    return LinearSCM(names=tuple(names[o] for o in order), parents=tuple(par_arrays),
                     coefficients=tuple(coef_arrays), noise_mean=means[order].copy(),
                     noise_variance=varis[order].copy(),
                     size=Size(graph=n, mechanism=max(1, max_in)), topology=topology,
                     seed=int(seed), name=name)


def _finite(value: Any, where: str, fieldname: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise InputError.at(where, fieldname, "a number", value)
    value = float(value)
    if not math.isfinite(value):
        raise InputError.at(where, fieldname, "a finite number", value)
    return value


# ----------------------------------------------------------------------------------------------
# the JSON format
# ----------------------------------------------------------------------------------------------
_VARIABLE_KEYS = {"name", "parents", "noise_mean", "noise_variance"}


def load_linear_scm(source: str | pathlib.Path | dict) -> LinearSCM:
    """Read a linear SCM from our JSON format (module docstring; ``docs/formats/linear_scm.md``).

    Parameters
    ----------
    source
        A path to a ``.json`` file, or the already-parsed object.

    Raises
    ------
    InputError
        Unreadable file, bad JSON, wrong family or version, or a bad field (named in the message).
    """
    if isinstance(source, dict):
        where, doc, stem = "linear_scm", source, "linear_scm"
    else:
        path = pathlib.Path(source)
        where, stem = str(path), path.stem
        try:
            doc = json.loads(path.read_text(encoding="utf-8"))
        except OSError as exc:
            raise InputError(f"{where}: cannot read the file ({exc.strerror or exc})") from exc
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise InputError(f"{where}: expected JSON, got a parse error ({exc})") from exc
    if not isinstance(doc, dict):
        raise InputError.at(where, None, "a JSON object", type(doc).__name__)
    if doc.get("family") != "linear_scm":
        raise InputError.at(where, "family", "'linear_scm'", doc.get("family"))
    if doc.get("format_version") != FORMAT_VERSION:
        raise InputError.at(where, "format_version", str(FORMAT_VERSION), doc.get("format_version"))
    variables = doc.get("variables")
    if not isinstance(variables, list) or not variables:
        raise InputError.at(where, "variables", "a non-empty list of objects", variables)
    names, parents, means, varis = [], [], [], []
    for i, var in enumerate(variables):
        if not isinstance(var, dict):
            raise InputError.at(where, f"variables[{i}]", "an object", var)
        extra = sorted(set(var) - _VARIABLE_KEYS)
        if extra:
            raise InputError.at(where, f"variables[{i}]",
                                "only the keys " + ", ".join(sorted(_VARIABLE_KEYS)), extra[0])
        if "name" not in var:
            raise InputError.at(where, f"variables[{i}].name", "a non-empty string", None)
        names.append(var["name"])
        parents.append(var.get("parents", {}))
        means.append(var.get("noise_mean", 0.0))
        varis.append(var.get("noise_variance", 1.0))
    name = doc.get("name", stem)
    return make_linear_scm(names, parents, means, varis, name=str(name), topology="file",
                           where=where)


def linear_scm_document(instance: LinearSCM) -> dict:
    """The JSON object of ``instance`` in our format (variables in topological order)."""
    variables = []
    for i, v in enumerate(instance.names):
        variables.append({
            "name": v,
            "parents": {instance.names[j]: float(c)
                        for j, c in zip(instance.parents[i], instance.coefficients[i])},
            "noise_mean": float(instance.noise_mean[i]),
            "noise_variance": float(instance.noise_variance[i]),
        })
    return {"family": "linear_scm", "format_version": FORMAT_VERSION, "name": instance.name,
            "variables": variables}


def dump_linear_scm(instance: LinearSCM, path: str | pathlib.Path) -> None:
    """Write ``instance`` in our JSON format; floats round-trip exactly (shortest repr)."""
    pathlib.Path(path).write_text(json.dumps(linear_scm_document(instance), indent=1) + "\n",
                                  encoding="utf-8")


# ----------------------------------------------------------------------------------------------
# queries: validation and grouping
# ----------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Shape:
    """The variables of a query as sorted index tuples; queries of one shape share a plan."""

    level: Level
    target: int
    evidence: tuple[int, ...]
    intervention: tuple[int, ...]


def _indices(instance: LinearSCM, pairs, part: str) -> dict[int, float]:
    out: dict[int, float] = {}
    for v, x in pairs:
        if v not in instance.index:
            raise InputError.at(f"query on {instance.name!r}", part, "a variable of the model", v)
        i = instance.index[v]
        if i in out:
            raise InputError.at(f"query on {instance.name!r}", part, "each variable once", v)
        out[i] = _finite(x, f"query on {instance.name!r}", f"{part} {v}")
    return out


def _parse(instance: LinearSCM, query: Query) -> tuple[_Shape, float, np.ndarray, np.ndarray]:
    """Check a query and split it into its shape, its threshold and its value rows."""
    where = f"query on {instance.name!r}"
    if query.kind not in _KINDS:
        raise UnsupportedQuery(f"{where}: kind: expected 'expectation' or 'exceedance' (a linear "
                               f"SCM is continuous: P(Y=y) is 0), got {query.kind!r}")
    if len(query.target) != 1:
        raise UnsupportedQuery(f"{where}: target: expected exactly one variable, "
                               f"got {len(query.target)}")
    (tv, tx), = query.target
    if tv not in instance.index:
        raise InputError.at(where, "target", "a variable of the model", tv)
    y = instance.index[tv]
    t = _finite(tx, where, "target value") if query.kind == "exceedance" else 0.0
    ev = _indices(instance, query.evidence, "evidence")
    do = _indices(instance, query.intervention, "intervention")
    level = Level(query.level)
    if level is not Level.COUNTERFACTUAL:
        if y in ev:
            raise InputError.at(where, "evidence", "no value for the target variable", tv)
        clash = sorted(set(ev) & set(do))
        if clash:
            raise UnsupportedQuery(f"{where}: evidence: expected no observation of an intervened "
                                   f"variable, got {instance.names[clash[0]]}")
    e_idx, x_idx = tuple(sorted(ev)), tuple(sorted(do))
    shape = _Shape(level, y, e_idx, x_idx)
    return (shape, t, np.array([ev[i] for i in e_idx], dtype=float),
            np.array([do[i] for i in x_idx], dtype=float))


def _ancestral(instance: LinearSCM, roots, cut: frozenset[int] = frozenset()) -> np.ndarray:
    """Sorted indices of ``roots`` and their ancestors; parents of ``cut`` nodes are ignored
    (the mutilated graph). O(a + edges among them)."""
    seen = set(roots)
    stack = list(roots)
    parents = instance.parents
    while stack:
        i = stack.pop()
        if i in cut:
            continue
        for j in parents[i].tolist():
            if j not in seen:
                seen.add(j)
                stack.append(j)
    return np.array(sorted(seen), dtype=np.intp)


# ----------------------------------------------------------------------------------------------
# flop formulas (one place, used by the engine's counter and by predicted_work)
# ----------------------------------------------------------------------------------------------
def _f_trsm(a: int, k: int) -> float:
    return float(k) * a * a


def _f_gemm(r: int, c: int, k: int) -> float:
    return 2.0 * r * c * k


def _f_chol(m: int) -> float:
    return m ** 3 / 3.0


def _f_chosolve(m: int, k: int) -> float:
    return 2.0 * m * m * k


def _plan_flops(level: Level, a: int, m: int, p_in: int) -> float:
    """Flops of one plan: ``a`` relevant variables, ``m`` evidence variables, ``p_in`` intervened
    variables inside the relevant set."""
    if level is Level.COUNTERFACTUAL:
        f = _f_trsm(a, m) + _f_gemm(1, a, m) + a * m + _f_gemm(m, a, m)    # R_E, m_E, D R_E, Gram
        f += _f_trsm(a, 1) + a + _f_gemm(1, a, m)                          # r', D g, h
        f += 2 * a + 2 * a                                                  # g'Dg, g'mu
        if m:
            f += _f_chol(m) + _f_chosolve(m, 1) + 2 * m + 2 * m             # beta, var, const
        return f
    s = m + 1
    f = _f_trsm(a, s) + _f_gemm(1, a, s) + a * s + _f_gemm(s, a, s)         # R, means, D R, Gram
    if m:
        f += _f_chol(m) + _f_chosolve(m, 1) + 2 * m + 2 * m                 # beta, var, const
        f += _f_gemm(1, m, p_in)                                            # gamma correction
    return f


def _row_flops(m: int, p: int, kind: str) -> float:
    return 2.0 * (m + p) + (3.0 if kind == "exceedance" else 0.0)


def _relevant(instance: LinearSCM, shape: _Shape) -> np.ndarray:
    roots = set(shape.evidence) | {shape.target}
    if shape.level is Level.INTERVENTIONAL:
        return _ancestral(instance, roots, cut=frozenset(shape.intervention))
    return _ancestral(instance, roots)


# ----------------------------------------------------------------------------------------------
# the closed-form engine
# ----------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Plan:
    """Conditional mean ``const + beta . e + gamma . x`` and variance of one query shape."""

    const: float
    beta: np.ndarray
    gamma: np.ndarray
    variance: float
    flops: float


def _unit_lower(instance: LinearSCM, rel: np.ndarray, cut: frozenset[int]
                ) -> tuple[np.ndarray, np.ndarray]:
    """Dense ``L_A = I - B[A, A]`` on the ancestral set ``A``; rows of ``cut`` keep only the 1."""
    a = len(rel)
    pos = np.full(instance.n_variables, -1, dtype=np.intp)
    pos[rel] = np.arange(a)
    lower = np.eye(a)
    for r, i in enumerate(rel.tolist()):
        if i in cut or not len(instance.parents[i]):
            continue
        # every parent of a non-cut node of an ancestral set is in the set
        lower[r, pos[instance.parents[i]]] = -instance.coefficients[i]
    return lower, pos


def _plan(instance: LinearSCM, shape: _Shape) -> _Plan:
    """Solve one query shape. Cost: :func:`_plan_flops` (counted as performed)."""
    from scipy.linalg import cho_factor, cho_solve, solve_triangular

    rel = _relevant(instance, shape)
    a, m = len(rel), len(shape.evidence)
    cut = frozenset(shape.intervention) if shape.level is Level.INTERVENTIONAL else frozenset()
    lower, pos = _unit_lower(instance, rel, cut)
    d = instance.noise_variance[rel].copy()
    mu = instance.noise_mean[rel].copy()
    e_loc = pos[list(shape.evidence)] if m else np.zeros(0, dtype=np.intp)
    x_in = [i for i in shape.intervention if pos[i] >= 0]
    x_loc = pos[x_in] if x_in else np.zeros(0, dtype=np.intp)
    x_which = np.array([k for k, i in enumerate(shape.intervention) if pos[i] >= 0], dtype=np.intp)
    gamma = np.zeros(len(shape.intervention))
    flops = 0.0

    def chol_beta(gram_ee: np.ndarray, rhs: np.ndarray) -> np.ndarray:
        nonlocal flops
        try:
            factor = cho_factor(gram_ee, lower=True, check_finite=False)
        except np.linalg.LinAlgError as exc:   # only with collinear evidence; variances are > 0
            raise UnsupportedQuery(f"query on {instance.name!r}: the evidence covariance is "
                                   f"singular (evidence determined by other evidence)") from exc
        flops += _f_chol(m) + _f_chosolve(m, 1)
        return cho_solve(factor, rhs, check_finite=False)

    if shape.level is Level.COUNTERFACTUAL:
        # abduction: X_E = R_E' U with R_E = L^{-T} I[:, E]; Sigma_EE = R_E' D R_E
        rhs = np.zeros((a, m))
        rhs[e_loc, np.arange(m)] = 1.0
        r_e = (solve_triangular(lower, rhs, lower=True, trans="T", unit_diagonal=True,
                                check_finite=False) if m else rhs)
        m_e = r_e.T @ mu
        dr_e = d[:, None] * r_e
        gram = r_e.T @ dr_e
        flops += _f_trsm(a, m) + _f_gemm(1, a, m) + a * m + _f_gemm(m, a, m)
        # action: mutilate in place (rows of intervened variables keep only their unit diagonal)
        for r, i in enumerate(rel.tolist()):
            if i in shape.intervention:
                lower[r, :r] = 0.0
        # prediction: Y' = r'.U' with r' = L'^{-T} e_y; intervened entries of U' are the set values
        e_y = np.zeros(a)
        e_y[pos[shape.target]] = 1.0
        r_y = solve_triangular(lower, e_y, lower=True, trans="T", unit_diagonal=True,
                               check_finite=False)
        gamma[x_which] = r_y[x_loc]
        g = r_y.copy()
        g[x_loc] = 0.0
        dg = d * g
        h = r_e.T @ dg
        flops += _f_trsm(a, 1) + a + _f_gemm(1, a, m)
        prior = float(g @ dg)
        const = float(g @ mu)
        flops += 2 * a + 2 * a
        if m:
            beta = chol_beta(gram, h)
            variance = prior - float(h @ beta)
            const -= float(beta @ m_e)
            flops += 2 * m + 2 * m
        else:
            beta = np.zeros(0)
            variance = prior
    else:
        if shape.level is Level.INTERVENTIONAL:
            d[x_loc] = 0.0     # a set variable has no noise
            mu[x_loc] = 0.0    # its value enters through gamma
        s_loc = np.concatenate([e_loc, [pos[shape.target]]]).astype(np.intp)
        s = m + 1
        rhs = np.zeros((a, s))
        rhs[s_loc, np.arange(s)] = 1.0
        r_s = solve_triangular(lower, rhs, lower=True, trans="T", unit_diagonal=True,
                               check_finite=False)
        means = r_s.T @ mu
        gram = r_s.T @ (d[:, None] * r_s)
        flops += _f_trsm(a, s) + _f_gemm(1, a, s) + a * s + _f_gemm(s, a, s)
        # the means are affine in the set values: d mean_S / d x_i = R[i, S]
        coef_x = r_s[x_loc, :].T if len(x_loc) else np.zeros((s, 0))     # (s, p_in)
        prior = float(gram[m, m])
        const = float(means[m])
        gamma_in = coef_x[m].copy()
        if m:
            beta = chol_beta(gram[:m, :m], gram[:m, m])
            variance = prior - float(gram[m, :m] @ beta)
            const -= float(beta @ means[:m])
            if coef_x.shape[1]:
                gamma_in -= beta @ coef_x[:m]
            flops += 2 * m + 2 * m + _f_gemm(1, m, coef_x.shape[1])
        else:
            beta = np.zeros(0)
            variance = prior
        gamma[x_which] = gamma_in
    if variance <= _DEGENERATE_RELATIVE_VARIANCE * max(prior, 0.0):
        # the evidence (or the intervention) determines the target: a point mass
        variance = 0.0
    return _Plan(const=const, beta=beta, gamma=gamma, variance=variance, flops=flops)


def _tail(mean: np.ndarray, sd: float, t: np.ndarray) -> np.ndarray:
    """P(N(mean, sd^2) > t); a point mass when ``sd == 0`` (strict inequality)."""
    if sd == 0.0:
        return (mean > t).astype(float)
    from scipy.special import ndtr

    return ndtr((mean - t) / sd)


# ----------------------------------------------------------------------------------------------
# independent references
# ----------------------------------------------------------------------------------------------
def closed_form_reference(instance: LinearSCM, query: Query) -> float:
    """The same quantity by a second, textbook path: dense inverse and joint covariance.

    ``Sigma = A D A'`` with ``A = inv(I - B)`` from :func:`numpy.linalg.inv`; conditioning by
    :func:`numpy.linalg.solve`; counterfactuals from the twin network (Balke & Pearl 1994): the
    joint Gaussian of the factual ``X_E = A[E] U`` and the counterfactual
    ``Y' = A'[y] (M U + x)`` (``A'`` the inverse of the mutilated system, ``M`` zeroing the noise of
    the intervened variables), conditioned on the factual evidence. O(n^3); meant for n <= a few
    hundred.
    """
    where = f"query on {instance.name!r}"
    shape, t, e_val, x_val = _parse(instance, query)
    n = instance.n_variables
    b = instance.dense_coefficients()
    mu = np.asarray(instance.noise_mean, dtype=float)
    dvar = np.asarray(instance.noise_variance, dtype=float)
    e, x = list(shape.evidence), list(shape.intervention)
    y = shape.target
    if shape.level is Level.COUNTERFACTUAL:
        a_fact = np.linalg.inv(np.eye(n) - b)
        b_cf = b.copy()
        b_cf[x, :] = 0.0
        a_cf = np.linalg.inv(np.eye(n) - b_cf)
        keep = np.ones(n)
        keep[x] = 0.0
        shift = np.zeros(n)
        shift[x] = x_val
        rows = np.vstack([a_fact[e, :], (a_cf[y, :] * keep)[None, :]])   # maps of U
        mean = rows @ mu
        mean[-1] += a_cf[y, :] @ shift
        cov = rows @ np.diag(dvar) @ rows.T
    else:
        bb, mm, dd = b.copy(), mu.copy(), dvar.copy()
        if shape.level is Level.INTERVENTIONAL:
            bb[x, :] = 0.0
            mm[x] = x_val
            dd[x] = 0.0
        amat = np.linalg.inv(np.eye(n) - bb)
        full_mean = amat @ mm
        full_cov = amat @ np.diag(dd) @ amat.T
        sel = e + [y]
        mean = full_mean[sel]
        cov = full_cov[np.ix_(sel, sel)]
    k = len(e)
    if k:
        w = np.linalg.solve(cov[:k, :k], cov[:k, k])
        cmean = mean[k] + w @ (e_val - mean[:k])
        cvar = cov[k, k] - cov[k, :k] @ w
    else:
        cmean, cvar = mean[k], cov[k, k]
    if cvar <= 1e-9 * max(cov[k, k], 0.0):
        cvar = 0.0
    if query.kind == "expectation":
        return float(cmean)
    if cvar == 0.0:
        return 1.0 if cmean > t else 0.0
    if not cvar > 0:
        raise UnsupportedQuery(f"{where}: negative conditional variance {cvar}")
    return float(0.5 * math.erfc((t - cmean) / math.sqrt(2.0 * cvar)))


def simulate(instance: LinearSCM, noise: np.ndarray, intervention: dict[int, float] | None = None
             ) -> np.ndarray:
    """Push noise rows ``(N, n)`` through the (mutilated) mechanisms, one variable at a time.

    Forward substitution in topological order, deliberately not the matrix code of the engine.
    O(N (n + edges)).
    """
    intervention = intervention or {}
    x = np.empty_like(noise)
    for i in range(instance.n_variables):
        if i in intervention:
            x[:, i] = intervention[i]
        elif len(instance.parents[i]):
            x[:, i] = noise[:, i] + x[:, instance.parents[i]] @ instance.coefficients[i]
        else:
            x[:, i] = noise[:, i]
    return x


def _least_squares(design: np.ndarray, response: np.ndarray) -> np.ndarray:
    """Ordinary least squares by the normal equations (few well-scaled columns, many rows)."""
    return np.linalg.solve(design.T @ design, design.T @ response)


def monte_carlo_reference(instance: LinearSCM, query: Query, n_samples: int = 200_000,
                          seed: int = 0) -> tuple[float, float]:
    """A Monte Carlo estimate of the query and its standard error, outside the Gaussian algebra.

    Noise is sampled, the mechanisms are simulated variable by variable (:func:`simulate`), and
    evidence on continuous variables is handled by least squares: in a jointly Gaussian world the
    regression of the quantity of interest on the evidence is its conditional mean, and the
    regression residuals are draws from its conditional law.

    * associational / interventional: regress the (mutilated-model) ``Y`` on ``X_E``;
      the posterior draws are ``fit(e) + residual_k``;
    * counterfactual: regress the noise vector ``U`` on the factual ``X_E`` (abduction), form
      posterior draws ``fit(e) + residual_k``, push them through the mutilated mechanisms
      (action, prediction).

    The value is the mean of the draws (expectation) or the fraction above ``t`` (exceedance).

    Returns
    -------
    (value, stderr)
        ``stderr`` combines the spread of the draws (``sd / sqrt(N)``, or the binomial
        ``sqrt(p (1 - p) / N)``) with the error of the fitted regression at ``e``
        (``sd * sqrt(x0' (X'X)^{-1} x0)``, carried to a probability by the normal density at
        ``t``). Accept an exact answer within 4 standard errors.

    Notes
    -----
    O(N (n + edges) + N m^2) for associational/interventional, O(N n m + N (n + edges)) for
    counterfactuals.
    """
    shape, t, e_val, x_val = _parse(instance, query)
    rng = make_rng(seed, "linear_scm-mc")
    n = instance.n_variables
    noise = instance.noise_mean + rng.standard_normal((n_samples, n)) * np.sqrt(
        instance.noise_variance)
    e = list(shape.evidence)
    do = dict(zip(shape.intervention, x_val.tolist()))
    if shape.level is Level.COUNTERFACTUAL:
        factual = simulate(instance, noise)
        design = np.column_stack([np.ones(n_samples), factual[:, e]])
        coef = _least_squares(design, noise)
        x0 = np.concatenate([[1.0], e_val])
        posterior = x0 @ coef + (noise - design @ coef)
        draws = simulate(instance, posterior, do)[:, shape.target]
    else:
        world = simulate(instance, noise, do if shape.level is Level.INTERVENTIONAL else None)
        design = np.column_stack([np.ones(n_samples), world[:, e]])
        resp = world[:, shape.target]
        coef = _least_squares(design, resp)
        x0 = np.concatenate([[1.0], e_val])
        draws = x0 @ coef + (resp - design @ coef)
    # leverage of the evidence point: the variance factor of the fitted mean at e
    gram = design.T @ design
    leverage = float(x0 @ np.linalg.solve(gram, x0)) if len(e) else 1.0 / n_samples
    sd = float(draws.std())
    mean = float(draws.mean())
    se_mean = sd * math.sqrt(leverage) if len(e) else sd / math.sqrt(n_samples)
    if query.kind == "expectation":
        return mean, se_mean
    p = float(np.mean(draws > t))
    density = 0.0
    if sd > 0:
        z = (t - mean) / sd
        density = math.exp(-0.5 * z * z) / (sd * math.sqrt(2 * math.pi))
    se = math.sqrt(p * (1 - p) / n_samples + (density * se_mean) ** 2)
    return p, se


# ----------------------------------------------------------------------------------------------
# the family
# ----------------------------------------------------------------------------------------------
@register
class LinearSCMFamily(FamilyBase):
    """Linear-Gaussian SCMs at every level, answered in closed form (module docstring).

    Parameters (keyword, stored by the constructor)
    -----------------------------------------------
    n_evidence : int, default 3
        Evidence variables per generated query (fewer on tiny graphs).
    reference_max_variables : int, default 200
        Largest model for which :meth:`reference` runs the dense O(n^3) second path.
    n_samples : int, default 200000
        Sample count of :meth:`monte_carlo_reference`.
    seed : int, default 0
        Seed of the Monte Carlo streams.

    Examples
    --------
    >>> fam = LinearSCMFamily()
    >>> inst = fam.build(Size(graph=6, mechanism=2), topology="chain", seed=1)
    >>> [len(p) for p in inst.parents]
    [0, 1, 2, 2, 2, 2]
    >>> q = fam.queries(inst, Level.COUNTERFACTUAL, n=1, seed=0)[0]
    >>> abs(fam.answer(inst, q).value - fam.reference(inst, q)) < 1e-9
    True
    """

    name: ClassVar[str] = "linear_scm"
    levels: ClassVar[frozenset[Level]] = frozenset(
        {Level.ASSOCIATIONAL, Level.INTERVENTIONAL, Level.COUNTERFACTUAL})
    methods: ClassVar[frozenset[str]] = frozenset({"exact"})
    mechanism_knob: ClassVar[str] = "in-degree (parents per variable)"
    work_unit: ClassVar[str] = "flops"

    # -- building ---------------------------------------------------------------------------
    def realizable(self, size: Size, *, topology: str) -> Size:
        """The size :meth:`build` makes: the graph generator may round (a grid is k x k), and
        no variable can have more parents than there are earlier variables, so the in-degree is
        capped at ``n - 1`` (a complete DAG)."""
        self.check_topology(topology)
        from model_zoo.topologies import realizable_graph_size

        n = realizable_graph_size(topology, int(size.graph))
        return Size(graph=n, mechanism=max(1, min(int(size.mechanism), n - 1)))

    def build(self, size: Size, *, topology: str, seed: int) -> LinearSCM:
        """A seeded instance with ``size.graph`` variables of in-degree ``size.mechanism``.

        The skeleton comes from ``model_zoo.topologies.make_graph(topology, n, seed=seed,
        max_in_degree=k)``. Every variable ``i`` is then given exactly ``min(k, i)`` parents.
        Missing ones are, for ``random``, uniformly random earlier variables; for the other
        shapes, the earlier variables nearest in *depth* (longest path from a root in the
        skeleton: one level up first, then two, ...; same-level variables last), ties broken by
        index distance — so the shape stays local: a chain with ``k=3`` becomes a band of width
        3, a layered graph keeps its edges between consecutive layers while a layer has room.
        Surplus skeleton parents (a skeleton with more than ``k``, e.g. a grid at ``k=1``) are
        dropped at random.
        Coefficients are ``+-U(0.3, 0.8) / k_i`` (``k_i`` parents), noise means ``U(-1, 1)`` and
        noise variances ``U(0.5, 1.5)``. Because the absolute coefficients of each mechanism sum to
        at most 0.8, ``sd(X_i) <= 0.8 max_j sd(X_j) + sd(U_i)``, so every standard deviation stays
        below ``sd_max(U) / 0.2`` however large the graph grows.

        Notes
        -----
        O(n k) plus the generator.
        """
        self.check_topology(topology)
        from model_zoo.topologies import make_graph

        k = int(size.mechanism)
        graph = make_graph(topology, int(size.graph), seed=seed, max_in_degree=k)
        names = _ordered_nodes(graph)
        n = len(names)
        pos = {v: i for i, v in enumerate(names)}
        rng = make_rng(seed, "linear_scm")
        skeleton = [sorted(pos[u] for u in graph.predecessors(v)) for v in names]
        depth = [0] * n
        for i, pa in enumerate(skeleton):
            depth[i] = 1 + max((depth[j] for j in pa), default=-1)
        by_depth: dict[int, list[int]] = {}
        for i in range(n):
            by_depth.setdefault(depth[i], []).append(i)     # each list ascending
        parent_dicts: list[dict[str, float]] = []
        for i in range(n):
            pa = skeleton[i]
            want = min(k, i)
            if len(pa) > want:
                pa = sorted(int(j) for j in rng.choice(pa, size=want, replace=False))
            elif len(pa) < want:
                have = set(pa)
                extra = want - len(pa)
                if topology == "random":
                    pa = pa + _random_earlier(i, have, extra, rng)
                else:
                    pa = pa + _nearest_earlier(i, depth, by_depth, have, extra)
                pa.sort()
            kk = max(len(pa), 1)
            mags = rng.uniform(0.3, 0.8, size=len(pa)) / kk
            signs = rng.choice([-1.0, 1.0], size=len(pa))
            parent_dicts.append({names[j]: float(c) for j, c in zip(pa, mags * signs)})
        means = rng.uniform(-1.0, 1.0, size=n)
        varis = rng.uniform(0.5, 1.5, size=n)
        return make_linear_scm(names, parent_dicts, means, varis,
                               name=f"linear_scm-{topology}-n{n}-k{k}-s{seed}",
                               topology=topology, seed=seed)

    # -- queries ----------------------------------------------------------------------------
    def queries(self, instance: LinearSCM, level: Level, *, n: int, seed: int) -> list[Query]:
        """``n`` random queries at ``level``, alternating expectation and exceedance.

        Evidence values come from a forward simulation of the model itself (typical values, so
        the evidence is never implausible); thresholds from a second simulation of the target.
        Interventional and counterfactual queries set one variable, to a value drawn around its
        own marginal; the target is preferably a later variable (one the intervention can reach).
        Counterfactual evidence may include the factual values of the target and of the
        intervened variable (the classic "had X been x" question).
        """
        level = self.check_level(level)
        rng = make_rng(seed, "linear_scm-queries", level.value)
        nv = instance.n_variables
        n_ev = int(self.params.get("n_evidence", 3))
        out: list[Query] = []
        for q in range(n):
            world = simulate(instance, (instance.noise_mean + rng.standard_normal((2, nv))
                                        * np.sqrt(instance.noise_variance)))
            kind = _KINDS[q % 2]
            do: list[int] = []
            if level is Level.ASSOCIATIONAL:
                y = int(rng.integers(nv))
                pool = [i for i in range(nv) if i != y]
            else:
                xi = int(rng.integers(max(nv - 1, 1)))
                do = [xi]
                later = list(range(xi + 1, nv))
                y = int(rng.choice(later)) if later else xi
                if level is Level.INTERVENTIONAL:
                    pool = [i for i in range(nv) if i not in (y, xi)]
                else:
                    pool = list(range(nv))
            k = min(n_ev, len(pool))
            ev = sorted(rng.choice(pool, size=k, replace=False).tolist()) if k else []
            evidence = tuple((instance.names[i], float(world[0, i])) for i in ev)
            intervention = tuple(
                (instance.names[i], float(world[1, i] + rng.normal())) for i in do)
            target = ((instance.names[y], float(world[1, y]) if kind == "exceedance" else 0.0),)
            out.append(Query(level=level, target=target, evidence=evidence,
                             intervention=intervention, kind=kind))
        return out

    # -- answering --------------------------------------------------------------------------
    def answer(self, instance: LinearSCM, query: Query, *, method: str = "exact") -> Answer:
        """The closed-form answer; ``work`` = flops performed (module docstring)."""
        return self.answer_batch(instance, [query], method=method)[0]

    def answer_batch(self, instance: LinearSCM, queries: Sequence[Query], *,
                     method: str = "exact") -> list[Answer]:
        """Answer many queries, solving each (target, evidence set, intervened set) group once.

        The plan of a group costs :func:`_plan_flops`; each of its ``q`` queries then costs one
        affine evaluation (``2 (m + p)`` flops, +3 for an exceedance). Each answer's ``work`` is
        its share of the plan plus its own evaluation.
        """
        self.check_method(method)
        parsed = []
        groups: dict[_Shape, list[int]] = {}
        for k, query in enumerate(queries):
            self.check_level(query.level)
            item = _parse(instance, query)
            parsed.append(item)
            groups.setdefault(item[0], []).append(k)
        out: list[Answer | None] = [None] * len(queries)
        for shape, members in groups.items():
            plan = _plan(instance, shape)
            ev = np.array([parsed[k][2] for k in members]).reshape(len(members), -1)
            xv = np.array([parsed[k][3] for k in members]).reshape(len(members), -1)
            means = plan.const + ev @ plan.beta + xv @ plan.gamma
            thresholds = np.array([parsed[k][1] for k in members])
            sd = math.sqrt(plan.variance)
            probs = _tail(means, sd, thresholds)
            share = plan.flops / len(members)
            m, p = len(shape.evidence), len(shape.intervention)
            for row, k in enumerate(members):
                kind = queries[k].kind
                value = float(means[row]) if kind == "expectation" else float(probs[row])
                note = "point mass: the evidence determines the target" if sd == 0.0 else ""
                out[k] = Answer(value=value, work=share + _row_flops(m, p, kind), note=note)
        return out  # type: ignore[return-value]

    def predicted_work(self, instance: LinearSCM, query: Query, *, method: str = "exact") -> float:
        """Flops of :meth:`answer` on this query from its shapes alone (no algebra is run).

        ``a`` = size of the ancestral set of the target and evidence (in the mutilated graph for
        interventional queries), ``m`` evidence and ``p`` intervened variables; the formula is
        the per-operation table of the module docstring.
        """
        self.check_method(method)
        shape, *_ = _parse(instance, query)
        rel = _relevant(instance, shape)
        p_in = len(set(rel.tolist()) & set(shape.intervention))
        return (_plan_flops(shape.level, len(rel), len(shape.evidence), p_in)
                + _row_flops(len(shape.evidence), len(shape.intervention), query.kind))

    def predicted_bytes(self, instance: LinearSCM, query: Query, *, method: str = "exact"
                        ) -> float | None:
        """Peak bytes of the dense block ``L_A`` (``8 a^2``) and the right-hand sides."""
        shape, *_ = _parse(instance, query)
        a = len(_relevant(instance, shape))
        m = len(shape.evidence)
        return float(8 * (a * a + 3 * a * (m + 1) + (m + 1) ** 2))

    def reference(self, instance: LinearSCM, query: Query) -> float | None:
        """:func:`closed_form_reference` (dense inverse, twin network) up to
        ``reference_max_variables`` variables, else None."""
        if instance.n_variables > int(self.params.get("reference_max_variables", 200)):
            return None
        return closed_form_reference(instance, query)

    def monte_carlo_reference(self, instance: LinearSCM, query: Query, *,
                              n_samples: int | None = None, seed: int | None = None
                              ) -> tuple[float, float]:
        """:func:`monte_carlo_reference` with the family's ``n_samples`` and ``seed``."""
        return monte_carlo_reference(
            instance, query,
            n_samples=int(n_samples if n_samples is not None
                          else self.params.get("n_samples", 200_000)),
            seed=int(seed if seed is not None else self.params.get("seed", 0)))

    # -- structure --------------------------------------------------------------------------
    def profile(self, instance: LinearSCM) -> dict[str, float]:
        """Structural profile: counts, in-degree, depth, and the flops of a typical query.

        ``typical_query_flops`` is :meth:`predicted_work` of the associational expectation of the
        last variable given the first ``min(n_evidence, n - 1)`` variables. O(n + edges).
        """
        n = instance.n_variables
        indeg = [len(p) for p in instance.parents]
        depth = [0] * n
        for i, pa in enumerate(instance.parents):
            if len(pa):
                depth[i] = 1 + max(depth[j] for j in pa.tolist())
        m = min(int(self.params.get("n_evidence", 3)), n - 1)
        typical = Query(level=Level.ASSOCIATIONAL, target=((instance.names[-1], 0.0),),
                        evidence=tuple((instance.names[i], 0.0) for i in range(m)),
                        kind="expectation")
        return {
            "n_variables": float(n),
            "n_edges": float(instance.n_edges),
            "max_in_degree": float(max(indeg)),
            "mean_in_degree": float(np.mean(indeg)),
            "n_parameters": float(instance.n_edges + 2 * n),
            "longest_path": float(max(depth)),
            "n_ancestors_last": float(len(_ancestral(instance, [n - 1]))),
            "typical_query_flops": float(self.predicted_work(instance, typical, method="exact")),
        }

    def expected_growth(self, *, axis: str, topology: str, level: Level, method: str) -> str | None:
        """Polynomial on both axes: at most cubic in the variables, and in-degree only widens the
        ancestral sets (bounded by the variables) — the dense algebra is never exponential."""
        if method != "exact" or axis not in ("graph", "mechanism"):
            return None
        return "polynomial"

    # -- files ------------------------------------------------------------------------------
    def load(self, source: str | pathlib.Path) -> LinearSCM:
        """Read our JSON format (:func:`load_linear_scm`)."""
        return load_linear_scm(source)

    def dump(self, instance: LinearSCM, path: str | pathlib.Path) -> None:
        """Write our JSON format (:func:`dump_linear_scm`)."""
        dump_linear_scm(instance, path)


def _random_earlier(i: int, have: set[int], extra: int, rng: np.random.Generator) -> list[int]:
    """``extra`` distinct uniform variables before ``i`` not in ``have``: by rejection when the
    pool is large (O(extra) expected), from the explicit pool when it is small."""
    if i <= 4 * (len(have) + extra):
        pool = [j for j in range(i) if j not in have]
        return [int(j) for j in rng.choice(pool, size=extra, replace=False)]
    out: list[int] = []
    taken = set(have)
    while len(out) < extra:
        j = int(rng.integers(i))
        if j not in taken:
            taken.add(j)
            out.append(j)
    return out


def _nearest_earlier(i: int, depth: list[int], by_depth: dict[int, list[int]], have: set[int],
                     extra: int) -> list[int]:
    """``extra`` variables before ``i`` and not in ``have``, nearest in depth (one level up
    first, then further up, then the same and deeper levels), then nearest in index.
    O(levels scanned + extra) per call with bisection in the per-depth lists."""
    import bisect

    levels = list(range(depth[i] - 1, -1, -1)) + [d for d in sorted(by_depth) if d >= depth[i]]
    out: list[int] = []
    for d in levels:
        bucket = by_depth[d]
        r = bisect.bisect_left(bucket, i) - 1       # the nearest earlier index at this depth
        while r >= 0 and len(out) < extra:
            j = bucket[r]
            if j not in have:
                out.append(j)
            r -= 1
        if len(out) == extra:
            break
    return out


def _ordered_nodes(graph) -> list[str]:
    """Nodes in a topological order that keeps the generator's order where it is one."""
    import networkx as nx

    nodes = list(graph.nodes)
    rank = {v: i for i, v in enumerate(nodes)}
    if all(rank[u] < rank[v] for u, v in graph.edges):
        return [str(v) for v in nodes]
    return [str(v) for v in nx.lexicographical_topological_sort(graph, key=lambda v: rank[v])]
