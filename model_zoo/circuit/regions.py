"""A faster root-only sum pass for circuits made of K x K region products (vtree circuits).

:func:`model_zoo.circuit.core.forward` in ``mode="sum"`` needs only the root. For circuits whose
sums come in *blocks* (m sums over one shared child set) and whose products each feed one block,
this module evaluates the circuit region by region instead of layer by layer:

* **cross ops** — a block whose children are the arity-2 products ``a_i x r_j`` of two child sets
  ``A`` (size a) and ``R`` (size r) is ``out = sum_ij W[:, i, j] A_i R_j``; the products are never
  materialised. Ops of equal shape at equal height run as one batched matrix product
  ``(J, m r, a) @ (J, a, B)`` followed by a multiply-and-sum with ``R`` (log-space: each input set
  is shifted by its per-column maximum and exponentiated once per *unit*, not per edge).
* **mix ops** — a block whose children are leaves or sums: ``out = W @ C``.
* **chains** — a cross op whose one input is a set of leaves and whose other input is the whole
  output of a block consumed by nothing else is *linear* in that block: ``out = M_l @ Y`` with
  ``M_l = sum_i W[:, i, :] A_i`` (a ``m x m`` matrix per batch column, computable from the leaves
  alone). A right-linear vtree is one such chain of length ``n - 1``; evaluating it layer by layer
  costs ``n`` dependent numpy calls whose Python overhead dominates thin layers. Here all ``M_l``
  are built by one batched product and multiplied together by a balanced tree of batched matrix
  products (matrix products are associative), each level renormalised with its log-scale kept
  aside: ``O(log n)`` numpy calls in place of ``O(n)``. For ``m = 1`` the chain is a sum of logs.

Two more routes, chosen per call by :func:`root_log_values_from_states`:

* **K = 1** — when every op has one unit and scalar weights the root's log is a fixed weighted
  sum of leaf logs plus a constant: one dot product per batch (:class:`LogLinearPlan`).
* **thin batches** (fewer than ``THIN_MAX_BATCH`` columns) — the same ops in linear space with a
  log-scale per block and the stack axis last (:class:`ThinPlan`, see the notes above
  ``THIN_MAX_BATCH``); used only when every weight is positive and not tiny.

Anything else (compiled arithmetic circuits, products feeding several blocks, products of
products) makes :func:`region_plan` return None and the caller uses the layered engine.

Cost: cross and mix ops do ``edges x batch`` multiply-adds like the layered pass (minus the
``2 K^2`` product edges per vtree node, which become part of the contraction); a chain of ``L``
links of width ``m`` does about ``L m^3`` multiply-adds per column instead of ``L (m^3 + 2 m^2)``
sequential ones. Memory: ``O((n_leaves + n_sums) x batch)`` plus one chunk of chain matrices.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["region_plan", "root_log_values", "root_log_values_from_states",
           "thin_root_log_values"]

#: Chains shorter than this run as ordinary ops (the tree reduction has a fixed overhead).
_MIN_CHAIN = 8
#: Upper bound on the elements of one intermediate array (about 32 MB of float64).
_CHUNK_ELEMENTS = 1 << 22
#: Chain widths up to this use an explicit loop over the inner index on batch-last arrays, which
#: is faster than stacked ``np.matmul`` on tiny matrices; wider chains use ``np.matmul``.
_LOOP_WIDTH = 4
_FLOOR = -1e300


@dataclass(frozen=True)
class _Cross:
    out: int                 # first output row (J blocks x m rows, contiguous)
    m: int
    a: int
    r: int
    a_rows: np.ndarray       # (J, a)
    r_rows: np.ndarray       # (J, r)
    w: np.ndarray            # (J, m * r, a): W transposed for the batched product


@dataclass(frozen=True)
class _Mix:
    out: int
    m: int
    rows: np.ndarray         # (J, k)
    w: np.ndarray            # (J, m, k)


@dataclass(frozen=True)
class _Chain:
    out: int                 # m output rows of the chain's top block
    m: int
    f: int
    leaf_rows: np.ndarray    # (L, f), top link first
    base_rows: np.ndarray    # (m,) the block below the bottom link
    w: np.ndarray            # (L, m * m, f): M_l[mo, c] = sum_f W[l, mo, f, c] A_f
    log_w: np.ndarray | None  # (L,) for m == 1: log W of each link


@dataclass(frozen=True)
class RegionPlan:
    n_rows: int
    n_leaves: int
    ops: tuple[Any, ...]
    root_row: int
    n_chains: int
    n_chain_links: int
    thin: Any = None         # ThinPlan for small batches, or None
    log_linear: Any = None   # LogLinearPlan when every op is scalar, or None


def region_plan(plan: Any, n_plan_rows: int) -> RegionPlan | None:
    """The region plan of a layered plan (:class:`model_zoo.circuit.core._Plan`), or None.

    O(n_edges) numpy work plus O(number of sum ops + chains) Python steps.
    """
    from model_zoo.circuit.core import _ProductOp, _SumOp

    n_leaves = plan.n_leaves
    left = np.full(n_plan_rows, -1, dtype=np.int64)
    right = np.full(n_plan_rows, -1, dtype=np.int64)
    is_prod = np.zeros(n_plan_rows, dtype=bool)
    sum_ops: list[_SumOp] = []
    for ops in plan.layers:
        for op in ops:
            if type(op) is _ProductOp:
                rows = np.arange(op.start, op.start + op.n)
                is_prod[rows] = True
                if op.arity != 2:
                    return None
                left[rows] = op.children[0::2]
                right[rows] = op.children[1::2]
            else:
                sum_ops.append(op)
    if is_prod[plan.root_row] or not sum_ops:
        return None
    # products may only feed the sums of one block: count product parents
    n_parents = np.zeros(n_plan_rows, dtype=np.int64)
    for op in sum_ops:
        np.add.at(n_parents, op.children.reshape(-1), op.m)

    # -- describe every block ------------------------------------------------------------------
    # block i: kind, output rows (m,), input rows and weights, in topological (plan) order
    kinds: list[str] = []
    outs: list[np.ndarray] = []
    a_rows: list[np.ndarray] = []
    r_rows: list[np.ndarray] = []
    weights: list[np.ndarray] = []
    for op in sum_ops:
        nb, m, k = op.n_blocks, op.m, op.k
        ch = op.children                                   # (nb, k) plan rows
        out_rows = op.start + np.arange(nb * m).reshape(nb, m)
        prod = is_prod[ch]
        if not prod.any():
            for b in range(nb):
                kinds.append("mix")
                outs.append(out_rows[b])
                a_rows.append(ch[b])
                r_rows.append(ch[b][:0])
                weights.append(op.weights[b])
            continue
        if not prod.all() or (n_parents[ch] != m).any():
            return None
        lf, rt = left[ch], right[ch]                      # (nb, k)
        if is_prod[lf].any() or is_prod[rt].any():
            return None
        sl, sr = np.sort(lf, axis=1), np.sort(rt, axis=1)
        n_a = 1 + (np.diff(sl, axis=1) != 0).sum(axis=1)
        n_r = 1 + (np.diff(sr, axis=1) != 0).sum(axis=1)
        if (n_a * n_r != k).any():
            return None
        for a in np.unique(n_a):
            sel = np.flatnonzero(n_a == a)
            a, r = int(a), k // int(a)
            if (n_r[sel] != r).any():
                return None
            ua = sl[sel][:, ::r]                           # (J, a) sorted distinct left rows
            ur = sr[sel][:, ::a]                           # (J, r)
            if not (np.repeat(ua, r, axis=1) == sl[sel]).all() or \
                    not (np.repeat(ur, a, axis=1) == sr[sel]).all():
                return None
            ai = (lf[sel][:, :, None] > ua[:, None, :]).sum(axis=2)   # (J, k) position in A
            ri = (rt[sel][:, :, None] > ur[:, None, :]).sum(axis=2)
            pair = np.sort(ai * r + ri, axis=1)
            if not (pair == np.arange(k)).all():
                return None                                # not the full cross product
            w4 = np.zeros((sel.shape[0], a, r, m))
            jj = np.arange(sel.shape[0])[:, None]
            w4[jj, ai, ri] = op.weights[sel].transpose(0, 2, 1)
            w4 = w4.transpose(0, 3, 1, 2)                  # (J, m, a, r)
            for t, b in enumerate(sel):
                kinds.append("cross")
                outs.append(out_rows[b])
                a_rows.append(ua[t])
                r_rows.append(ur[t])
                weights.append(w4[t])
    n_blocks = len(kinds)
    block_of = np.full(n_plan_rows, -1, dtype=np.int64)
    for i, o in enumerate(outs):
        block_of[o] = i
    # consumers of each block's outputs (as blocks); -1 = several
    consumer = np.full(n_blocks, -2, dtype=np.int64)
    used = block_of[np.concatenate(a_rows + r_rows)] if n_blocks else np.empty(0, np.int64)
    user = np.concatenate([np.repeat(np.arange(n_blocks), [x.shape[0] for x in a_rows]),
                           np.repeat(np.arange(n_blocks), [y.shape[0] for y in r_rows])]) \
        if n_blocks else np.empty(0, np.int64)
    keep = used >= 0
    pairs = np.unique(np.stack([used[keep], user[keep]], axis=1), axis=0) if keep.any() \
        else np.empty((0, 2), np.int64)
    n_users = np.bincount(pairs[:, 0], minlength=n_blocks)
    consumer[pairs[:, 0]] = pairs[:, 1]
    consumer[n_users > 1] = -1
    root_block = int(block_of[plan.root_row])

    # -- chain links: X (cross) -> Y when X's one input is leaves and the other is all of Y --
    link: dict[int, tuple[int, bool]] = {}            # X -> (Y, chain input is the A side)
    for i in range(n_blocks):
        if kinds[i] != "cross":
            continue
        w = weights[i]
        m = w.shape[0]
        for side_a, chain_rows, leaf_rows in ((False, r_rows[i], a_rows[i]),
                                              (True, a_rows[i], r_rows[i])):
            if (leaf_rows >= n_leaves).any() or chain_rows.shape[0] != m:
                continue
            y = int(block_of[chain_rows[0]])
            if y < 0 or consumer[y] != i or outs[y].shape[0] != m:
                continue
            if not (np.sort(outs[y]) == chain_rows).all():
                continue
            link[i] = (y, side_a)
            break
    targets = {y for y, _ in link.values()}
    chains: dict[int, list[int]] = {}                 # top block -> links top..bottom
    interior: set[int] = set()
    for top in link:
        if top in targets:
            continue
        path = [top]
        shape = weights[top].shape[0], (a_rows[top] if not link[top][1] else r_rows[top]).shape[0]
        y = link[top][0]
        while y in link:
            f = (a_rows[y] if not link[y][1] else r_rows[y]).shape[0]
            if (weights[y].shape[0], f) != shape:
                break
            path.append(y)
            y = link[y][0]
        if len(path) >= _MIN_CHAIN:
            chains[top] = path
            interior.update(path[1:])

    # -- heights and grouping ------------------------------------------------------------------
    height = np.zeros(n_plan_rows, dtype=np.int64)
    groups: dict[tuple, list[int]] = {}
    for i in range(n_blocks):
        if i in interior:
            continue
        if i in chains:
            bottom = chains[i][-1]
            base = outs[link[bottom][0]]
            h = 1 + int(height[base].max())
            key: tuple = ("chain", h, i)
        else:
            rows = np.concatenate([a_rows[i], r_rows[i]])
            h = 1 + int(height[rows].max()) if rows.size else 1
            w = weights[i]
            key = (kinds[i], h) + w.shape
        height[outs[i]] = h
        groups.setdefault(key, []).append(i)

    compact = np.full(n_plan_rows, -1, dtype=np.int64)
    compact[:n_leaves] = np.arange(n_leaves)
    next_row = n_leaves
    ops: list[Any] = []
    n_links = 0
    for key in sorted(groups, key=lambda k: (k[1], k[0])):
        members = groups[key]
        kind = key[0]
        for i in members:
            compact[outs[i]] = next_row + np.arange(outs[i].shape[0])
            next_row += outs[i].shape[0]
        start = int(compact[outs[members[0]][0]])
        if kind == "mix":
            ops.append(_Mix(out=start, m=key[2],
                            rows=np.stack([a_rows[i] for i in members]),
                            w=np.stack([weights[i] for i in members])))
        elif kind == "cross":
            _, _, m, a, r = key
            w = np.stack([weights[i] for i in members])           # (J, m, a, r)
            ops.append(_Cross(out=start, m=m, a=a, r=r,
                              a_rows=np.stack([a_rows[i] for i in members]),
                              r_rows=np.stack([r_rows[i] for i in members]),
                              w=np.ascontiguousarray(w.transpose(0, 1, 3, 2).reshape(
                                  len(members), m * r, a))))
        else:
            path = chains[members[0]]
            n_links += len(path)
            ws, leaves = [], []
            for x in path:
                w = weights[x]                                    # (m, a, r)
                if link[x][1]:                                    # chain input on the A side
                    w = w.transpose(0, 2, 1)                      # -> (m, f=r, c=a)
                    leaves.append(r_rows[x])
                else:
                    leaves.append(a_rows[x])
                ws.append(w)
            w = np.stack(ws)                                      # (L, m, f, c)
            m, f = w.shape[1], w.shape[2]
            bottom_y = link[path[-1]][0]
            log_w = None
            if m == 1 and f == 1:
                with np.errstate(divide="ignore"):
                    log_w = np.log(w[:, 0, 0, 0])
            ops.append(_Chain(out=start, m=m, f=f, leaf_rows=np.stack(leaves),
                              base_rows=np.sort(outs[bottom_y]),
                              w=np.ascontiguousarray(w.transpose(0, 1, 3, 2).reshape(
                                  len(path), m * m, f)),
                              log_w=log_w))
    # translate plan rows to compact rows
    final = []
    for op in ops:
        if type(op) is _Cross:
            final.append(_Cross(op.out, op.m, op.a, op.r, compact[op.a_rows], compact[op.r_rows],
                                op.w))
        elif type(op) is _Mix:
            final.append(_Mix(op.out, op.m, compact[op.rows], op.w))
        else:
            final.append(_Chain(op.out, op.m, op.f, compact[op.leaf_rows],
                                compact[op.base_rows], op.w, op.log_w))
    for op in final:
        rows = [op.a_rows, op.r_rows] if type(op) is _Cross else (
            [op.rows] if type(op) is _Mix else [op.leaf_rows, op.base_rows])
        if any((x < 0).any() for x in rows):
            return None  # an input outside the region structure (should not happen)
    root_row = int(compact[plan.root_row])
    if root_row < 0 or root_block < 0:
        return None
    rp = RegionPlan(n_rows=next_row, n_leaves=n_leaves, ops=tuple(final), root_row=root_row,
                    n_chains=len(chains), n_chain_links=n_links)
    return RegionPlan(n_rows=rp.n_rows, n_leaves=rp.n_leaves, ops=rp.ops, root_row=rp.root_row,
                      n_chains=rp.n_chains, n_chain_links=rp.n_chain_links,
                      thin=_thin_plan(rp, plan.leaf_logp, plan.leaf_logsum),
                      log_linear=_log_linear_plan(rp))


# -- evaluation ---------------------------------------------------------------------------------
def _shifted(values: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray]:
    """``exp(values - top)`` and ``top`` (the maximum along ``axis``, floored so that an all
    ``-inf`` slice gives zeros and a ``-inf`` result instead of nan)."""
    top = values.max(axis=axis, keepdims=True)
    np.maximum(top, _FLOOR, out=top)
    e = values - top
    np.exp(e, out=e)
    return e, top


def _stacked_matmul(w: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``w @ x`` for stacks ``(J, p, q) @ (J, q, B)``. Stacked ``np.matmul`` pays about a
    microsecond per matrix, which dominates tiny matrices (K = 1, 2 vtree nodes, batch 1); for an
    inner size up to ``_LOOP_WIDTH`` a loop of broadcast multiply-adds over the stack is faster."""
    q = w.shape[2]
    if q > _LOOP_WIDTH:
        return np.matmul(w, x)
    out = w[:, :, 0, None] * x[:, None, 0, :]
    for i in range(1, q):
        out += w[:, :, i, None] * x[:, None, i, :]
    return out


def _run_cross(vals: np.ndarray, op: _Cross, batch: int) -> None:
    j_all = op.a_rows.shape[0]
    per = op.m * op.r * batch + (op.a + op.r) * batch
    step = max(1, _CHUNK_ELEMENTS // max(per, 1))
    for j0 in range(0, j_all, step):
        j1 = min(j_all, j0 + step)
        ea, ta = _shifted(vals[op.a_rows[j0:j1]], 1)              # (J, a, B)
        er, tr = _shifted(vals[op.r_rows[j0:j1]], 1)              # (J, r, B)
        t = _stacked_matmul(op.w[j0:j1], ea).reshape(j1 - j0, op.m, op.r, batch)
        t *= er[:, None, :, :]
        s = t.sum(axis=2)                                         # (J, m, B)
        np.log(s, out=s)
        s += ta
        s += tr
        vals[op.out + j0 * op.m:op.out + j1 * op.m] = s.reshape(-1, batch)


def _run_mix(vals: np.ndarray, op: _Mix, batch: int) -> None:
    ec, tc = _shifted(vals[op.rows], 1)                           # (J, k, B)
    s = _stacked_matmul(op.w, ec)                                 # (J, m, B)
    np.log(s, out=s)
    s += tc
    vals[op.out:op.out + op.rows.shape[0] * op.m] = s.reshape(-1, batch)


def _renormalise(p: np.ndarray, scale: np.ndarray, axes: tuple[int, int]) -> None:
    """Divide each matrix of ``p`` by its largest entry and add the log of it to ``scale``."""
    mx = p.max(axis=axes)
    pos = mx > 0
    safe = np.where(pos, mx, 1.0)
    if axes == (1, 2):
        p /= safe[:, None, None, :]
    else:
        p /= safe[:, :, None, None]
    with np.errstate(divide="ignore"):
        scale += np.where(pos, np.log(safe), -np.inf)


def _pair_products(p: np.ndarray, batch_last: bool) -> np.ndarray:
    """Products ``p[0] p[1], p[2] p[3], ...`` of a stack of square matrices (even length)."""
    a, b = p[0::2], p[1::2]
    if batch_last:                       # (n, m, m, B): loop over the inner index
        out = a[:, :, 0, None, :] * b[:, None, 0, :, :]
        for k in range(1, p.shape[1]):
            out += a[:, :, k, None, :] * b[:, None, k, :, :]
        return out
    return np.matmul(a, b)               # (n, B, m, m)


def _chain_segment(vals: np.ndarray, op: _Chain, lo: int, hi: int, batch: int,
                   batch_last: bool) -> tuple[np.ndarray, np.ndarray]:
    """The product ``M_lo ... M_{hi-1}`` (renormalised) and its log-scale per column."""
    m = op.m
    ef, tf = _shifted(vals[op.leaf_rows[lo:hi]], 1)               # (L, f, B), (L, 1, B)
    mats = _stacked_matmul(op.w[lo:hi], ef).reshape(hi - lo, m, m, batch)
    scale = tf[:, 0, :].copy()                                    # (L, B)
    if not batch_last:
        mats = np.ascontiguousarray(mats.transpose(0, 3, 1, 2))   # (L, B, m, m)
    axes = (1, 2) if batch_last else (2, 3)
    _renormalise(mats, scale, axes)
    while mats.shape[0] > 1:
        if mats.shape[0] % 2:
            eye = np.zeros((1,) + mats.shape[1:])
            if batch_last:
                eye[0, np.arange(m), np.arange(m), :] = 1.0
            else:
                eye[0, :, np.arange(m), np.arange(m)] = 1.0
            mats = np.concatenate([mats, eye])
            scale = np.concatenate([scale, np.zeros((1, batch))])
        mats = _pair_products(mats, batch_last)
        scale = scale[0::2] + scale[1::2]
        _renormalise(mats, scale, axes)
    return mats[0], scale[0]


def _run_chain(vals: np.ndarray, op: _Chain, batch: int) -> None:
    n_links = op.leaf_rows.shape[0]
    if op.m == 1 and op.log_w is not None:
        # scalar links: the chain is a sum of logs
        acc = vals[op.base_rows[0]] + op.log_w.sum()
        acc = acc + vals[op.leaf_rows[:, 0]].sum(axis=0)
        vals[op.out] = acc
        return
    m = op.m
    batch_last = m <= _LOOP_WIDTH
    step = max(2, _CHUNK_ELEMENTS // max(1, 2 * m * max(m, op.f) * batch))
    ev, tv = _shifted(vals[op.base_rows].copy(), 0)               # (m, B), (1, B)
    log_scale = tv[0].copy()
    # from the bottom link up: v <- (M_lo ... M_hi-1) v
    for hi in range(n_links, 0, -step):
        lo = max(0, hi - step)
        p, s = _chain_segment(vals, op, lo, hi, batch, batch_last)
        if batch_last:
            ev = (p * ev[None, :, :]).sum(axis=1)                 # (m, B)
        else:
            ev = np.matmul(p, ev.T[:, :, None])[:, :, 0].T
        log_scale = log_scale + s
        mx = ev.max(axis=0)
        pos = mx > 0
        safe = np.where(pos, mx, 1.0)
        ev = ev / safe
        with np.errstate(divide="ignore"):
            log_scale = log_scale + np.where(pos, np.log(safe), -np.inf)
    with np.errstate(divide="ignore"):
        vals[op.out:op.out + m] = np.log(ev) + log_scale


def root_log_values(rplan: RegionPlan, leaf_values: np.ndarray) -> np.ndarray:
    """Root log-values ``(batch,)`` from the ``(n_leaves, batch)`` leaf log-values."""
    batch = leaf_values.shape[1]
    vals = np.empty((rplan.n_rows, batch))
    vals[:rplan.n_leaves] = leaf_values
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for op in rplan.ops:
            kind = type(op)
            if kind is _Cross:
                _run_cross(vals, op, batch)
            elif kind is _Mix:
                _run_mix(vals, op, batch)
            else:
                _run_chain(vals, op, batch)
    return vals[rplan.root_row].copy()


# -- thin batches: stack-last layout, linear space ----------------------------------------------
# At small batch the ops above are dominated by numpy's handling of short axes: a reduction over
# the a = K inputs of (J, a, B) arrays, or a stacked matmul of J tiny matrices, costs ~20-50 ns
# per stacked item (measured: 15 us for a max over (313, 2, 1), 16 us for np.matmul of 313 2x2),
# far more than the arithmetic. The thin engine puts the stack axis J (and the batch) *last* so
# every call runs over long contiguous rows and reductions run over leading axes. It also works in
# linear space: each block's values are divided by their maximum and the log of it is kept in a
# per-block scale, so a unit costs no exp and no log (one log per block per op). That is exact
# arithmetic rearranged, and safe from underflow when every sum weight is positive and not tiny:
# then each normalised block output is >= w_min times its maximum (the condition is checked when
# the plan is built; otherwise the log-space ops above are used).

#: Batches below this use the thin engine (at 64 and more the log-space ops meet the goal).
THIN_MAX_BATCH = 16
#: Weights and leaf probabilities below this (or zero weights) keep the log-space engine.
_SAFE_MIN = 1e-60
#: Normaliser floor: a block that is all zero stays zero and ends as -inf.
_TINY = 1e-300


@dataclass(frozen=True)
class _TCross:
    out: int                 # output rows out + mo * J + j
    blk: int                 # output blocks blk .. blk + J - 1 in the scale table
    a_rows: np.ndarray       # (a, J)
    r_rows: np.ndarray       # (r, J)
    a_blk: np.ndarray | None  # (J,) scale rows of the inputs; None: leaves (scale 0)
    r_blk: np.ndarray | None
    w: np.ndarray            # (m, a * r, J, 1): W[mo, i * r + j]


@dataclass(frozen=True)
class _TMix:
    out: int
    blk: int
    rows: np.ndarray         # (k, J)
    c_blk: np.ndarray | None
    w: np.ndarray            # (m, k, J, 1)


@dataclass(frozen=True)
class _TChain:
    out: int
    blk: int
    leaf_rows: np.ndarray    # (f, L) top link first
    base_rows: np.ndarray    # (m,)
    base_blk: int
    w: np.ndarray            # (m, m, f, L, 1): M_l[mo, c] = sum_f w[mo, c, f, l] A_f


@dataclass(frozen=True)
class ThinPlan:
    n_rows: int
    n_blocks: int            # scale rows, row 0 is the leaves' zero scale
    n_leaves: int
    leaf_table: np.ndarray   # (n_leaves * (S + 1),) flat: per leaf [sum p, p_0 .. p_S-1]
    leaf_base: np.ndarray    # (n_leaves, 1) leaf * (S + 1) + 1
    n_states: int            # S
    ops: tuple[Any, ...]
    root_row: int
    root_blk: int


@dataclass(frozen=True)
class LogLinearPlan:
    """Every op has one unit, one input per side and a scalar weight (K = 1): the root's log is
    ``const + coef @ leaf_log[leaves]``."""
    leaves: np.ndarray | None  # leaf rows with a nonzero coefficient (None: all)
    coef: np.ndarray
    const: float


def _log_linear_plan(rp: RegionPlan) -> LogLinearPlan | None:
    """O(n_rows) once; None unless every op is scalar (a K = 1 circuit)."""
    for op in rp.ops:
        if type(op) is _Cross and not (op.m == op.a == op.r == 1):
            return None
        if type(op) is _Mix and not (op.m == 1 and op.rows.shape[1] == 1):
            return None
        if type(op) is _Chain and op.log_w is None:
            return None
    coef = np.zeros(rp.n_rows)
    coef[rp.root_row] = 1.0
    const = 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        for op in reversed(rp.ops):
            if type(op) is _Chain:
                c = coef[op.out]
                if c == 0:
                    continue
                coef[op.base_rows[0]] += c
                np.add.at(coef, op.leaf_rows[:, 0], c)
                const += c * float(op.log_w.sum())
                continue
            j = op.a_rows.shape[0] if type(op) is _Cross else op.rows.shape[0]
            c = coef[op.out:op.out + j]
            used = c != 0
            if not used.any():
                continue
            inputs = [op.a_rows[:, 0], op.r_rows[:, 0]] if type(op) is _Cross else [op.rows[:, 0]]
            for rows in inputs:
                np.add.at(coef, rows[used], c[used])
            const += float((c[used] * np.log(op.w.reshape(j)[used])).sum())
    leaf_coef = coef[:rp.n_leaves]
    keep = np.flatnonzero(leaf_coef != 0)
    if keep.shape[0] == rp.n_leaves:
        return LogLinearPlan(leaves=None, coef=leaf_coef, const=const)
    return LogLinearPlan(leaves=keep, coef=leaf_coef[keep], const=const)


def _thin_plan(rp: RegionPlan, leaf_logp: np.ndarray, leaf_logsum: np.ndarray
               ) -> ThinPlan | None:
    """The stack-last re-layout of a region plan, or None when linear space is not safe.

    O(n_rows + weights) once.
    """
    n, nl = rp.n_rows, rp.n_leaves
    with np.errstate(over="ignore"):
        probs = np.exp(leaf_logp)
        sums = np.exp(leaf_logsum)
    pos = np.concatenate([probs[probs > 0], sums[sums > 0]])
    if pos.size and (pos.min() < _SAFE_MIN or pos.max() > 1 / _SAFE_MIN):
        return None
    new = np.arange(n)                      # old compact row -> thin row
    blk_of = np.zeros(n, dtype=np.int64)    # thin row -> scale row (0 for leaves)
    next_blk = 1
    ops: list[Any] = []

    def input_blocks(rows: np.ndarray) -> tuple[np.ndarray | None, bool]:
        """(J,) scale rows of each input set (rows (J, k) thin; None when all are leaves) and
        whether every set is one block's rows or leaves only (row 0: the leaves' zero scale)."""
        b = blk_of[rows]
        ok = bool((b == b[:, :1]).all())
        return (None if not b.any() else b[:, 0].copy()), ok

    def weights_ok(w: np.ndarray) -> bool:
        flat = w.reshape(w.shape[0], -1) if w.ndim > 1 else w
        return bool(w.size and w.min() >= _SAFE_MIN and np.isfinite(w).all()
                    and flat.sum(axis=-1).max() <= 1 / _SAFE_MIN)

    for op in rp.ops:
        if type(op) is _Chain:
            l_n, m, f = op.leaf_rows.shape[0], op.m, op.f
            w = op.w.reshape(l_n, m, m, f)                       # [l, mo, c, f]
            if not weights_ok(op.w.reshape(l_n * m, m * f)):
                return None
            base = new[op.base_rows]
            if (base < nl).any() or (blk_of[base] != blk_of[base[0]]).any():
                return None
            ops.append(_TChain(out=op.out, blk=next_blk, leaf_rows=new[op.leaf_rows].T.copy(),
                               base_rows=base, base_blk=int(blk_of[base[0]]),
                               w=np.ascontiguousarray(w.transpose(1, 2, 3, 0))[..., None]))
            blk_of[op.out:op.out + m] = next_blk
            next_blk += 1
            continue
        if type(op) is _Cross:
            j_n, m, a, r = op.a_rows.shape[0], op.m, op.a, op.r
            w = op.w.reshape(j_n, m, r, a)                       # [j, mo, rj, ai]
            if not weights_ok(w.reshape(j_n * m, r * a)):
                return None
            a_rows, r_rows = new[op.a_rows], new[op.r_rows]
            a_blk, ok_a = input_blocks(a_rows)
            r_blk, ok_r = input_blocks(r_rows)
            if not (ok_a and ok_r):
                return None
            w4 = np.ascontiguousarray(w.transpose(1, 3, 2, 0).reshape(m, a * r, j_n))
            thin = _TCross(out=op.out, blk=next_blk, a_rows=a_rows.T.copy(),
                           r_rows=r_rows.T.copy(), a_blk=a_blk, r_blk=r_blk, w=w4[..., None])
        else:
            j_n, m, k = op.rows.shape[0], op.m, op.rows.shape[1]
            if not weights_ok(op.w.reshape(j_n * m, k)):
                return None
            rows = new[op.rows]
            c_blk, ok = input_blocks(rows)
            if not ok:
                return None
            thin = _TMix(out=op.out, blk=next_blk, rows=rows.T.copy(), c_blk=c_blk,
                         w=np.ascontiguousarray(op.w.transpose(1, 2, 0))[..., None])
        # outputs: old rows out + j m + mo -> thin rows out + mo J + j
        jj, mm = np.meshgrid(np.arange(j_n), np.arange(m), indexing="ij")
        new[op.out + jj * m + mm] = op.out + mm * j_n + jj
        blk_of[op.out + mm * j_n + jj] = next_blk + jj
        next_blk += j_n
        ops.append(thin)
    s = leaf_logp.shape[1]
    table = np.concatenate([sums[:, None], probs], axis=1)      # column 0: variable free
    root = int(new[rp.root_row])
    return ThinPlan(n_rows=n, n_blocks=next_blk, n_leaves=nl, leaf_table=table.reshape(-1),
                    leaf_base=(np.arange(nl) * (s + 1) + 1)[:, None], n_states=s,
                    ops=tuple(ops), root_row=root, root_blk=int(blk_of[root]))


def _normalise_into(out: np.ndarray, dest: np.ndarray, log_scale: np.ndarray) -> None:
    """``dest = out / max_0(out)`` and ``log_scale = log max_0(out)`` (max over axis 0)."""
    mx = out.max(axis=0)
    np.maximum(mx, _TINY, out=mx)
    np.divide(out, mx, out=dest)
    np.log(mx, out=log_scale)


def _thin_cross(vals, scale, op: _TCross, batch: int) -> None:
    m, ar, j_all = op.w.shape[0], op.w.shape[1], op.w.shape[2]
    slab = vals[op.out:op.out + m * j_all].reshape(m, j_all, batch)
    step = max(1, _CHUNK_ELEMENTS // max(1, m * ar * batch))
    for j0 in range(0, j_all, step):
        j1 = min(j_all, j0 + step)
        whole = j0 == 0 and j1 == j_all
        ar_ = op.a_rows if whole else op.a_rows[:, j0:j1]
        rr_ = op.r_rows if whole else op.r_rows[:, j0:j1]
        av, rv = vals[ar_], vals[rr_]                            # (a, J, B), (r, J, B)
        p = (av[:, None] * rv[None]).reshape(ar, j1 - j0, batch)
        w = op.w if whole else op.w[:, :, j0:j1]
        if ar == 1:
            out = w[:, 0] * p[0]
        else:
            out = (w * p[None]).sum(axis=1)                     # (m, J, B)
        s = scale[op.blk + j0:op.blk + j1]
        _normalise_into(out, slab if whole else slab[:, j0:j1], s)
        if op.a_blk is not None:
            s += scale[op.a_blk if whole else op.a_blk[j0:j1]]
        if op.r_blk is not None:
            s += scale[op.r_blk if whole else op.r_blk[j0:j1]]


def _thin_mix(vals, scale, op: _TMix, batch: int) -> None:
    m, k, j_all = op.w.shape[0], op.w.shape[1], op.w.shape[2]
    slab = vals[op.out:op.out + m * j_all].reshape(m, j_all, batch)
    step = max(1, _CHUNK_ELEMENTS // max(1, m * k * batch))
    for j0 in range(0, j_all, step):
        j1 = min(j_all, j0 + step)
        cv = vals[op.rows[:, j0:j1]]                             # (k, J, B)
        out = (op.w[:, :, j0:j1] * cv[None]).sum(axis=1)         # (m, J, B)
        s = scale[op.blk + j0:op.blk + j1]
        _normalise_into(out, slab[:, j0:j1], s)
        if op.c_blk is not None:
            s += scale[op.c_blk[j0:j1]]


def _thin_renormalise(p: np.ndarray, log_scale: np.ndarray) -> None:
    """Divide each matrix ``p[:, :, l, b]`` by its largest entry; add its log to log_scale."""
    m = p.shape[0]
    mx = p.reshape(m * m, *p.shape[2:]).max(axis=0)
    np.maximum(mx, _TINY, out=mx)
    p /= mx
    log_scale += np.log(mx)


def _thin_chain(vals, scale, op: _TChain, batch: int) -> None:
    m, f, n_links = op.w.shape[0], op.w.shape[2], op.w.shape[3]
    step = max(2, _CHUNK_ELEMENTS // max(1, m * m * max(m, f) * batch))
    v = vals[op.base_rows]                                      # (m, B), normalised
    log_v = scale[op.base_blk].copy()
    for hi in range(n_links, 0, -step):
        lo = max(0, hi - step)
        leaves = vals[op.leaf_rows[:, lo:hi]]                   # (f, L, B)
        w = op.w[:, :, :, lo:hi]                                 # (m, m, f, L, 1)
        if f == 1:
            mats = w[:, :, 0] * leaves[0]                        # (m, m, L, B)
        else:
            mats = (w * leaves[None, None]).sum(axis=2)
        ls = np.zeros((hi - lo, batch))
        _thin_renormalise(mats, ls)
        while mats.shape[2] > 1:
            odd = mats.shape[2] % 2
            if odd:
                last, last_s = mats[:, :, -1:], ls[-1:]
                mats, ls = mats[:, :, :-1], ls[:-1]
            # (M_{2i} M_{2i+1})[i, j] = sum_k a[i, k] b[k, j]
            prod = (mats[:, :, None, 0::2] * mats[None, :, :, 1::2]).sum(axis=1)
            ls = ls[0::2] + ls[1::2]
            if odd:
                prod = np.concatenate([prod, last], axis=2)
                ls = np.concatenate([ls, last_s])
            mats = prod
            _thin_renormalise(mats, ls)
        v = (mats[:, :, 0] * v[None]).sum(axis=1)               # (m, B)
        log_v = log_v + ls[0]
        mx = v.max(axis=0)
        np.maximum(mx, _TINY, out=mx)
        v = v / mx
        log_v += np.log(mx)
    vals[op.out:op.out + m] = v
    scale[op.blk] = log_v


def thin_root_log_values(tp: ThinPlan, leaf_var: np.ndarray, states: np.ndarray) -> np.ndarray:
    """Root log-values ``(batch,)`` from ``(n_variables, batch)`` states (-1 = marginalised);
    states must lie in ``-1 .. n_states - 1`` (the caller checks).

    O(n_edges x batch) arithmetic in O(depth) numpy calls per op kind, O(n_rows x batch) memory.
    """
    batch = states.shape[1]
    vals = np.empty((tp.n_rows, batch))
    idx = states[leaf_var]
    idx += tp.leaf_base
    np.take(tp.leaf_table, idx, out=vals[:tp.n_leaves])
    scale = np.empty((tp.n_blocks, batch))
    scale[0] = 0.0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
        for op in tp.ops:
            kind = type(op)
            if kind is _TCross:
                _thin_cross(vals, scale, op, batch)
            elif kind is _TMix:
                _thin_mix(vals, scale, op, batch)
            else:
                _thin_chain(vals, scale, op, batch)
        return np.log(vals[tp.root_row]) + scale[tp.root_blk]


def root_log_values_from_states(rplan: RegionPlan, plan: Any, states: np.ndarray) -> np.ndarray:
    """Root log-values ``(batch,)`` from ``(n_variables, batch)`` int64 states (-1 = free).

    Picks the cheapest exact route: a K = 1 circuit is a weighted sum of leaf logs (one dot
    product); a thin batch (< ``THIN_MAX_BATCH`` columns) with states in range uses the
    stack-last linear-space engine; anything else the log-space region ops.
    """
    from model_zoo.circuit.core import _leaf_rows

    batch = states.shape[1]
    if rplan.log_linear is not None:
        ll: LogLinearPlan = rplan.log_linear
        leaf = _leaf_rows(plan, states, "sum")
        if ll.leaves is not None:
            leaf = leaf[ll.leaves]
        with np.errstate(invalid="ignore"):
            return ll.const + ll.coef @ leaf
    tp: ThinPlan | None = rplan.thin
    if tp is not None and batch < THIN_MAX_BATCH and states.size:
        lo, hi = states.min(), states.max()
        if lo >= -1 and hi < tp.n_states:
            return thin_root_log_values(tp, plan.leaf_var, states)
    return root_log_values(rplan, _leaf_rows(plan, states, "sum"))
