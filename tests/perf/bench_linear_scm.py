"""Benchmark of the linear_scm engine (issue 9): counterfactuals batched over evidence rows.

Rows (``run() -> list[dict]``, the ``make bench`` table), for a random linear-Gaussian SCM of
``N_VARIABLES`` variables and ``N_QUERIES`` counterfactual queries of one shape (same target,
evidence and intervened variables; evidence values from simulated worlds):

* ``batched vs single``: queries per second of one ``answer_batch`` call (one Cholesky plan,
  then one affine evaluation per row) against answering the same queries one ``answer`` at a
  time. Goal: batched faster (ratio >= 1; it is the point of the plan).
* ``single vs dense-inverse path``: one ``answer`` against
  :func:`model_zoo.linear_scm.closed_form_reference` (the textbook route: ``inv(I - B)``, joint
  covariance, twin network) on the same queries. Goal: >= 1.
* ``no explicit inverse``: ``numpy.linalg.inv``, ``numpy.linalg.pinv`` and ``scipy.linalg.inv``
  are replaced by functions that raise while the engine answers; ``met`` when it still answers.

Answers are compared (batched, single and reference, |difference| <= 1e-9 relative to scale).
Timing: median of repeats of ``time.perf_counter_ns``; BLAS threads set to 1.

Not collected by pytest; asserts nothing. Run alone: ``python -m tests.perf.bench_linear_scm``.
"""

from __future__ import annotations

import numpy as np

from tests.perf.timing import median_seconds

N_VARIABLES = 200
N_QUERIES = 1000
N_REFERENCE = 50
IN_DEGREE = 3


def _median(fn, repeats: int = 5) -> float:
    return median_seconds(fn, repeats, warmup=True)


def _same_shape_queries(fam, inst, n: int, seed: int):
    """``n`` counterfactual queries sharing the first generated query's shape."""
    from model_zoo.base import Level, Query
    from model_zoo.linear_scm import simulate

    (q0,) = fam.queries(inst, Level.COUNTERFACTUAL, n=1, seed=seed)
    rng = np.random.default_rng(seed)
    index = {name: i for i, name in enumerate(inst.names)}
    noise = inst.noise_mean + rng.standard_normal((n, inst.n_variables)) * np.sqrt(
        inst.noise_variance)
    worlds = simulate(inst, noise)
    out = []
    for row in worlds:
        out.append(Query(level=Level.COUNTERFACTUAL, target=q0.target,
                         evidence=tuple((v, float(row[index[v]])) for v, _ in q0.evidence),
                         intervention=q0.intervention, kind=q0.kind))
    return out


class _NoInverse:
    """Makes explicit inverses raise while active (the engine must use solves)."""

    def __enter__(self):
        import scipy.linalg

        self._saved = (np.linalg.inv, np.linalg.pinv, scipy.linalg.inv)

        def refuse(*args, **kwargs):
            raise RuntimeError("explicit inverse called")

        np.linalg.inv = np.linalg.pinv = scipy.linalg.inv = refuse
        return self

    def __exit__(self, *exc):
        import scipy.linalg

        np.linalg.inv, np.linalg.pinv, scipy.linalg.inv = self._saved
        return False


def run() -> list[dict]:
    from threadpoolctl import threadpool_limits

    import model_zoo
    from model_zoo.base import Size
    from model_zoo.linear_scm import closed_form_reference

    fam = model_zoo.get("linear_scm")()
    rows = []
    with threadpool_limits(1):
        inst = fam.build(Size(graph=N_VARIABLES, mechanism=IN_DEGREE), topology="random", seed=0)
        queries = _same_shape_queries(fam, inst, N_QUERIES, seed=0)
        batched = [a.value for a in fam.answer_batch(inst, queries, method="exact")]
        single = [fam.answer(inst, q, method="exact").value for q in queries]
        sub = queries[:N_REFERENCE]
        ref = [closed_form_reference(inst, q) for q in sub]
        scale = max(1.0, max(abs(x) for x in ref))
        err = max(max(abs(a - b) for a, b in zip(batched, single)),
                  max(abs(a - b) for a, b in zip(single[:N_REFERENCE], ref)))
        ok = err <= 1e-9 * scale
        t_batch = _median(lambda: fam.answer_batch(inst, queries, method="exact")) / len(queries)
        t_single = _median(lambda: [fam.answer(inst, q, method="exact") for q in sub]) / len(sub)
        t_ref = _median(lambda: [closed_form_reference(inst, q) for q in sub]) / len(sub)
        shape = (f"n={N_VARIABLES} random, counterfactual {queries[0].kind} "
                 f"with {len(queries[0].evidence)} evidence vars")
        wrong = f"WRONG: answers differ by {err:.2g}"
        rows.append({"engine": "linear_scm",
                     "workload": f"{shape}: {N_QUERIES} queries batched vs one by one (s/query)",
                     "ours": t_batch, "peer_or_floor": t_single, "ratio": t_single / t_batch,
                     "goal": "batched/single throughput >= 1" if ok else wrong,
                     "met": bool(ok and t_single >= t_batch)})
        rows.append({"engine": "linear_scm",
                     "workload": f"{shape}: single query vs dense-inverse path (s/query)",
                     "ours": t_single, "peer_or_floor": t_ref, "ratio": t_ref / t_single,
                     "goal": "dense-inverse/ours >= 1" if ok else wrong,
                     "met": bool(ok and t_ref >= t_single)})
        try:
            with _NoInverse():
                fam.answer_batch(inst, queries[:10], method="exact")
                for q in queries[:3]:
                    fam.answer(inst, q, method="exact")
            no_inverse, note = True, "answers with inv/pinv disabled"
        except RuntimeError as exc:
            no_inverse, note = False, str(exc)
        rows.append({"engine": "linear_scm", "workload": f"{shape}: no explicit inverse",
                     "ours": None, "peer_or_floor": None, "ratio": None,
                     "goal": f"Cholesky/triangular solves only ({note})", "met": no_inverse})
    return rows


if __name__ == "__main__":
    for row in run():
        print(row)
