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
  ``THIN_MAX_BATCH``); used only when every weight is positive and not tiny. When the blocks form
  a tree (vtree circuits) a lean program runs instead: renormalisation only where plan-time
  bounds require it, K = 2 levels merged in pairs, chains contracted in bit-reversed halves (see
  the notes above ``_LEAN_LIMIT``).

Anything else (compiled arithmetic circuits, products feeding several blocks, products of
products) makes :func:`region_plan` return None and the caller uses the layered engine.

Cost: cross and mix ops do ``edges x batch`` multiply-adds like the layered pass (minus the
``2 K^2`` product edges per vtree node, which become part of the contraction); a chain of ``L``
links of width ``m`` does about ``L m^3`` multiply-adds per column instead of ``L (m^3 + 2 m^2)``
sequential ones. Memory: ``O((n_leaves + n_sums) x batch)`` plus one chunk of chain matrices.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

import numpy as np

try:  # np.einsum without its Python dispatch (~1.4 us a call; the lean program makes ~10 a pass)
    from numpy._core.multiarray import c_einsum as _einsum
except ImportError:  # pragma: no cover - numpy < 2 or a renamed internal
    _einsum = np.einsum

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
                      thin=_thin_plan(rp, plan.leaf_logp, plan.leaf_logsum, plan.leaf_var),
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
    lean: Any = None         # _LeanProgram when the blocks form a tree and bounds allow, or None
    leaf_var: np.ndarray | None = None  # (n_leaves,) variable of each leaf row


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


def _thin_plan(rp: RegionPlan, leaf_logp: np.ndarray, leaf_logsum: np.ndarray,
               leaf_var: np.ndarray | None = None) -> ThinPlan | None:
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
    tp = ThinPlan(n_rows=n, n_blocks=next_blk, n_leaves=nl, leaf_table=table.reshape(-1),
                  leaf_base=(np.arange(nl) * (s + 1) + 1)[:, None], n_states=s,
                  ops=tuple(ops), root_row=root, root_blk=int(blk_of[root]),
                  leaf_var=None if leaf_var is None else np.asarray(leaf_var, dtype=np.int64))
    lean = _lean_program(tp)
    if lean is None:
        return tp
    return replace(tp, lean=lean)


def _normalise_into(out: np.ndarray, dest: np.ndarray, log_scale: np.ndarray) -> None:
    """``dest = out / max_0(out)`` and ``log_scale = log max_0(out)`` (max over axis 0)."""
    mx = out.max(axis=0)
    np.maximum(mx, _TINY, out=mx)
    np.divide(out, mx, out=dest)
    np.log(mx, out=log_scale)


def _store_chunk(out: np.ndarray, dest: np.ndarray, scale: np.ndarray, blk: int, j0: int,
                 j1: int, input_blks: tuple, whole: bool) -> None:
    """Blocks ``j0:j1`` of an op: ``out`` normalised into ``dest``, their log-scales set to
    its logs plus the log-scales of the input blocks (None: leaves, scale 0)."""
    s = scale[blk + j0:blk + j1]
    _normalise_into(out, dest, s)
    for b in input_blks:
        if b is not None:
            s += scale[b if whole else b[j0:j1]]


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
        _store_chunk(out, slab if whole else slab[:, j0:j1], scale, op.blk, j0, j1,
                     (op.a_blk, op.r_blk), whole)


def _thin_mix(vals, scale, op: _TMix, batch: int) -> None:
    m, k, j_all = op.w.shape[0], op.w.shape[1], op.w.shape[2]
    slab = vals[op.out:op.out + m * j_all].reshape(m, j_all, batch)
    step = max(1, _CHUNK_ELEMENTS // max(1, m * k * batch))
    for j0 in range(0, j_all, step):
        j1 = min(j_all, j0 + step)
        cv = vals[op.rows[:, j0:j1]]                             # (k, J, B)
        out = (op.w[:, :, j0:j1] * cv[None]).sum(axis=1)         # (m, J, B)
        _store_chunk(out, slab[:, j0:j1], scale, op.blk, j0, j1, (op.c_blk,), False)


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
    vals = np.empty((tp.n_rows + 1, batch))       # + a constant-one row (padding links)
    lean = tp.lean
    if lean is None or lean.needs_leaves:
        idx = states.take(leaf_var, axis=0)
        idx += tp.leaf_base
        np.take(tp.leaf_table, idx, out=vals[:tp.n_leaves])
    if lean is not None:
        vals[tp.n_rows] = 1.0
        if np.geterr()["under"] == "ignore":      # the default; errstate costs ~3 us a call
            return _lean_root_log_values(tp, vals, batch, states)
        with np.errstate(under="ignore"):         # negligible terms may underflow
            return _lean_root_log_values(tp, vals, batch, states)
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


# -- thin batches, lean program: the block tree, renormalised only where bounds require ----------
# Profiled at batch 1 (~10^4 edges, K >= 2), the thin ops above make ~14 numpy calls per op
# (1.5-3 us each on the bench machine): two gathers, the product, the weighted sum, then max /
# floor / divide / log of the renormalisation and two gathers + adds carrying the input blocks'
# log-scales. When every block (the sum outputs of one op row) feeds exactly one input set of one
# later block and the root feeds none -- a tree of blocks, as in every vtree circuit -- most go:
# * the root is linear in each block's values, so dividing a block by c divides the root by c:
#   the log-scale is the sum of the logs of every divisor (one log + sum at the end), with no
#   per-block scale table;
# * a block is renormalised only when bounds no longer prove its units stay in
#   [exp(-_LEAN_LIMIT), exp(_LEAN_LIMIT)]. With positive weights every unit of a product block
#   lies in [w_min, max weight-row sum] x the product of its input sets' maxima; bounds on each
#   block's maximum are propagated at plan time and a block is renormalised when they leave
#   [-span, span], span = (limit - widest log-weight) / (input sets of its consumer), so the
#   next op is still in range. Units above exp(-600) keep full relative precision; a term that
#   underflows is < 1e-307 against a unit > 1e-260;
# * K = 2: two levels merge into one op over four input sets (16 terms per unit, coefficients
#   summed at plan time), halving the ops of a balanced circuit; a one-unit root reading one
#   block is folded into that block's op (its weights pre-multiplied by the root's);
# * chains: a product's row sums lie within the products of its factors' row sums, and with
#   positive links the ratio of two entries in one column (row) of P Q is at least the smallest
#   such ratio of P (of Q) -- Birkhoff's contraction argument -- so entries stay within
#   exp(-(s_r + s_c)) of the maximum, s_r and s_c read off the weights: a renormalisation every
#   several tree levels suffices. Chunks of c 2^k links (c = 1, 3, 5, 7; identity padding) are
#   stored bit-reversed so each level multiplies two contiguous halves (einsum at width 2,
#   stacked matmul wider); the last c matrices, the vector, and on right-linear circuits the
#   root's op, are one einsum, the base's op one matrix-vector product. A link reads the K
#   leaves of one variable, so its matrix takes one of S + 1 values: they are tabulated at
#   plan time and looked up from the states (with the base's leaves, one gather), and a
#   program made of such chains fills no leaf rows at all;
# * weighted sums reduce over a *leading* axis (contiguous rows); ops with few blocks
#   (J <= _LEAN_MATMUL_J) run as one stacked matmul, which beats broadcasting there; wider
#   two-set ops gather the two sets (not the grid of their products) and form, weigh and sum
#   the products in one three-operand einsum. Every einsum here calls numpy's C entry point
#   directly (the Python wrapper costs ~1.4 us of the ~5 us of a small einsum).
# Zero inputs stay exactly zero (a zero block makes its parent zero, the root ends as -inf).

#: Units of every computed block stay within exp(+-_LEAN_LIMIT) (doubles reach exp(+-708)).
_LEAN_LIMIT = 600.0
#: Ops with at most this many blocks use stacked np.matmul; wider ops broadcast and reduce.
_LEAN_MATMUL_J = 40
#: Odd chunk factors c of chains (c 2^k links); the last c matrices form one einsum.
_LEAN_ODD = (3, 5, 7)
#: Two levels of two-set ops merge into one four-set op when it has at most this many product
#: terms per unit (K = 2: 16; halves the numpy calls of a balanced circuit).
_LEAN_FUSE_Q = 16


@dataclass(frozen=True)
class _LeanProgram:
    steps: tuple[tuple, ...]
    n_renorm: int            # ops or chain levels that renormalise (for tests and notes)
    n_levels: int            # ops plus chain tree levels
    needs_leaves: bool = True  # False: every step reads states directly (no leaf rows filled)


@dataclass(frozen=True)
class _SetProduct:
    """``out[:, j] = sum_q w[:, q, j] prod_s X_s[x_s(q), j]`` over input sets ``X_s`` given as
    ``(rows (k_s, J), scale rows (J,) or None for leaves)``; q runs over the sets in C order."""
    out: int
    blk: int
    sets: tuple[tuple[np.ndarray, np.ndarray | None], ...]
    w: np.ndarray            # (m, q, J)


def _lean_ops(tp: ThinPlan) -> list[Any]:
    """The thin plan's cross and mix ops as :class:`_SetProduct`; chains kept as they are."""
    gops: list[Any] = []
    for op in tp.ops:
        if type(op) is _TChain:
            gops.append(op)
        elif type(op) is _TCross:
            gops.append(_SetProduct(op.out, op.blk, ((op.a_rows, op.a_blk),
                                                     (op.r_rows, op.r_blk)), op.w[..., 0]))
        else:
            gops.append(_SetProduct(op.out, op.blk, ((op.rows, op.c_blk),), op.w[..., 0]))
    return gops


def _fuse_levels(gops: list[Any]) -> list[Any]:
    """Merge two-set ops whose input sets are all outputs of two-set ops into one four-set op
    (two levels in one pass), when the merged product has at most ``_LEAN_FUSE_Q`` terms per
    unit (K = 2). Coefficients ``sum_ir W[o, i, r] W_A[i, .] W_R[r, .]`` are exact sums of
    positive products. Top-down, so a merged op's children are never merged upwards.

    O(n_blocks) Python steps and O(weights x 4) numpy work, once per plan.
    """
    where: dict[int, tuple[int, int]] = {}             # block -> (gop, position in it)
    for gi, g in enumerate(gops):
        if type(g) is not _TChain:
            j_n = g.w.shape[2]
            for jj in range(j_n):
                where[g.blk + jj] = (gi, jj)
    lower: set[int] = set()
    absorbed: dict[int, dict[int, int]] = {}            # merged op -> {kid op: blocks read}
    out: dict[int, _SetProduct] = {}
    for gi in range(len(gops) - 1, -1, -1):
        g = gops[gi]
        if type(g) is _TChain or gi in lower or len(g.sets) != 2:
            continue
        sides = []
        for rows, blks in g.sets:
            if blks is None:
                break
            kids = {where.get(int(b), (-1, 0))[0] for b in blks}
            if any(k < 0 or type(gops[k]) is _TChain or len(gops[k].sets) != 2
                   for k in kids):
                break
            sizes = {tuple(s[0].shape[0] for s in gops[k].sets) for k in kids}
            if len(sizes) != 1:
                break
            sides.append((rows, blks, kids, sizes.pop()))
        if len(sides) != 2:
            continue
        q = int(np.prod(sides[0][3]) * np.prod(sides[1][3]))
        if q > _LEAN_FUSE_Q:
            continue
        w_up = g.w                                   # (m, a r, J)
        m, _, j_n = w_up.shape
        new_sets: list[tuple[np.ndarray, np.ndarray | None]] = []
        factors = []
        ok = True
        for rows, blks, kids, sizes in sides:
            k_n = rows.shape[0]
            sub_rows = [np.empty((sz, j_n), dtype=np.int64) for sz in sizes]
            sub_blks = [np.zeros(j_n, dtype=np.int64) for _ in sizes]
            sub_leaf = [np.zeros(j_n, dtype=bool) for _ in sizes]
            wk = np.empty((k_n, int(np.prod(sizes)), j_n))
            for j in range(j_n):
                kid_i, jj = where[int(blks[j])]
                kid = gops[kid_i]
                kid_j = kid.w.shape[2]
                mo = (rows[:, j] - kid.out) // kid_j            # unit of the kid block
                wk[:, :, j] = kid.w[mo, :, jj]
                for s, (srows, sblk) in enumerate(kid.sets):
                    sub_rows[s][:, j] = srows[:, jj]
                    if sblk is None:
                        sub_leaf[s][j] = True
                    else:
                        sub_blks[s][j] = sblk[jj]
            for s in range(len(sizes)):
                if sub_leaf[s].all():
                    new_sets.append((sub_rows[s], None))
                elif not sub_leaf[s].any():
                    new_sets.append((sub_rows[s], sub_blks[s]))
                else:
                    ok = False                          # a set mixing leaves and blocks
            factors.append(wk)
        if not ok:
            continue
        fed: dict[int, int] = {}                        # kid op -> its blocks read here
        for rows, blks, kids, sizes in sides:
            lower.update(kids)
            for b in blks:
                kid_i = where[int(b)][0]
                fed[kid_i] = fed.get(kid_i, 0) + 1
        absorbed[gi] = fed
        a_n, r_n = sides[0][0].shape[0], sides[1][0].shape[0]
        w4 = np.einsum("oirj,iaj,rbj->oabj", w_up.reshape(m, a_n, r_n, j_n), factors[0],
                       factors[1]).reshape(m, q, j_n)
        out[gi] = _SetProduct(g.out, g.blk, tuple(new_sets), w4)
    return _apply_fusion(gops, out, absorbed, lower)


def _apply_fusion(gops: list[Any], merged: dict[int, _SetProduct],
                  absorbed: dict[int, dict[int, int]], lower: set[int]) -> list[Any]:
    """The ops after merging. An op that would feed merged and unmerged ops alike is kept and
    its merged consumers are undone (its divisors would count for blocks the root no longer
    reads), until no op is half consumed."""
    merged = dict(merged)
    while True:
        read: dict[int, int] = {}
        for up in merged:
            for kid, n in absorbed[up].items():
                read[kid] = read.get(kid, 0) + n
        half = {kid for kid, n in read.items() if n < gops[kid].w.shape[2]}
        undo = [up for up in merged if half.intersection(absorbed[up])]
        if not undo:
            break
        for up in undo:
            del merged[up]
    result = []
    for gi, g in enumerate(gops):
        if gi in merged:
            result.append(merged[gi])
        elif gi in read:
            continue                                    # every block feeds a merged op
        else:
            result.append(g)
    return result


def _fold_root_op(gops: list[Any], root_row: int) -> list[Any]:
    """Fold a one-unit root op that reads only the units of the single block before it into
    that block's op (``root = sum_o c_o out_o``, so its weights become ``sum_o c_o w[o]``): one
    op fewer on a balanced circuit. The same sums of products, regrouped; O(weights) once."""
    if len(gops) < 2 or type(gops[-1]) is _TChain or type(gops[-2]) is _TChain:
        return gops
    root, below = gops[-1], gops[-2]
    m, q, j_n = below.w.shape
    if (len(root.sets) != 1 or root.w.shape[0] != 1 or root.w.shape[2] != 1 or j_n != 1
            or root.out != root_row):
        return gops
    rows = root.sets[0][0][:, 0]
    if ((rows < below.out) | (rows >= below.out + m)).any():
        return gops
    coef = np.zeros(m)
    np.add.at(coef, rows - below.out, root.w[0, :, 0])
    if not (coef > 0).all():             # a unit the root ignores: keep both ops
        return gops
    w = np.einsum("o,oq->q", coef, below.w[:, :, 0])[None, :, None]
    return gops[:-2] + [_SetProduct(root.out, root.blk, below.sets, w)]


def _lean_program(tp: ThinPlan, forced: frozenset = frozenset()) -> _LeanProgram | None:
    """The lean schedule of a thin plan, or None (blocks not a tree, or bounds too wide).

    O(n_rows + weights) once (twice per chain whose base must be renormalised after all). Each
    step is a tuple read by :func:`_lean_root_log_values`; ``forced``: steps that renormalise.
    """
    n_blocks = tp.n_blocks
    uses = np.zeros(n_blocks, dtype=np.int64)
    for op in tp.ops:
        if type(op) is _TChain:
            uses[op.base_blk] += 1
            continue
        for b in ((op.a_blk, op.r_blk) if type(op) is _TCross else (op.c_blk,)):
            if b is not None:
                np.add.at(uses, b, 1)
    uses[0] = 1                                   # the leaves' pseudo-block
    expect = np.ones(n_blocks, dtype=np.int64)
    expect[tp.root_blk] = 0
    if tp.root_blk == 0 or not (uses == expect).all():
        return None
    table = tp.leaf_table
    pos = table[table > 0]
    if not pos.size:
        return None
    leaf_lb, leaf_ub = float(np.log(pos.min())), float(np.log(pos.max()))
    gops = _fold_root_op(_fuse_levels(_lean_ops(tp)), tp.root_row)
    # log-bounds on each block's maximum, relative to what was divided out (row 0: leaves)
    lb = np.zeros(n_blocks)
    ub = np.zeros(n_blocks)
    lb[0], ub[0] = leaf_lb, leaf_ub
    widest = [-leaf_lb, leaf_ub]
    arity = np.ones(n_blocks, dtype=np.int64)      # input sets of each block's consumer
    for g in gops:
        if type(g) is _TChain:
            w = g.w
            widest += [-float(np.log(w.min())), float(np.log(w.sum(axis=2).max()))]
            continue
        w = g.w
        widest += [-float(np.log(w.min())), float(np.log(w.sum(axis=1).max()))]
        for _, blks in g.sets:
            if blks is not None:
                arity[blks] = len(g.sets)
    steps: list[tuple] = []
    producer: dict[int, int] = {}                  # block -> index of the step writing it
    table2 = table.reshape(tp.n_leaves, tp.n_states + 1)
    n_renorm = n_levels = 0
    for g in gops:
        if type(g) is _TChain:
            op = g
            base = int(op.base_blk)
            span = (_LEAN_LIMIT - max(widest)) / int(arity[op.blk])
            step = _lean_chain(op, table2, tp.n_rows, (float(lb[base]), float(ub[base])), span)
            if step is None:
                i = producer.get(base, -1)
                if i < 0 or steps[i][-1]:
                    return None
                # too wide with the base as computed: plan again, renormalising the base's op
                return _lean_program(tp, forced | {i})
            steps.append(step)
            for _, _, _, flags, _, renorm_v, _ in step[4]:
                n_renorm += int(sum(flags)) + renorm_v
                n_levels += len(flags)
            lb[op.blk], ub[op.blk] = step[6], step[7]
            producer[int(op.blk)] = len(steps) - 1
            continue
        w = g.w                                 # (m, q, J)
        m, q, j_n = w.shape
        sets = g.sets
        sizes = [rows.shape[0] for rows, _ in sets]
        grid = np.indices(sizes).reshape(len(sets), -1)          # (s, q): C order
        idx = np.stack([rows[grid[s]] for s, (rows, _) in enumerate(sets)])   # (s, q, J)
        lo = float(np.log(w.min()))
        hi = float(np.log(w.sum(axis=1).max()))
        for _, b in sets:
            lo += lb[0] if b is None else float(lb[b].min())
            hi += ub[0] if b is None else float(ub[b].max())
        if lo < -_LEAN_LIMIT or hi > _LEAN_LIMIT:
            return None
        blocks = np.arange(g.blk, g.blk + j_n)
        producer.update((int(b), len(steps)) for b in blocks)
        span = (_LEAN_LIMIT - max(widest)) / float(arity[blocks].max())
        if not span > 0:
            return None
        renorm = lo < -span or hi > span or len(steps) in forced
        if renorm:
            lb[blocks] = ub[blocks] = 0.0
            n_renorm += 1
        else:
            lb[blocks], ub[blocks] = lo, hi
        n_levels += 1
        mm: bool | str = j_n <= _LEAN_MATMUL_J
        if mm:                                     # (s, J, q) gathers, (J, m, q) weights
            idx = np.ascontiguousarray(idx.transpose(0, 2, 1))
            w = np.ascontiguousarray(w.transpose(2, 0, 1))
        elif len(sets) == 2 and sizes[0] == sizes[1]:
            # two sets: gather the sets themselves, not the q-grid of their products, and let
            # one three-operand einsum form and weigh the products (2 calls instead of 3)
            mm = "sets"
            idx = np.stack([rows for rows, _ in sets])          # (2, k, J)
            w = np.ascontiguousarray(w.reshape(m, sizes[0], sizes[1], j_n))
        else:                                      # (s, q, J) gathers, (q, m, J) weights
            w = np.ascontiguousarray(w.transpose(1, 0, 2))
        steps.append((mm, g.out, m, q, j_n, len(sets), idx, w, renorm))
    steps = _state_tables(_fold_into_chains(steps, tp), tp)
    needs = any(st[0] is not None or any(ch[6] is None for ch in st[4]) for st in steps)
    return _LeanProgram(steps=tuple(steps), n_renorm=n_renorm, n_levels=n_levels,
                        needs_leaves=needs)


def _fold_into_chains(steps: list[tuple], tp: ThinPlan) -> list[tuple]:
    """Fold into a one-chunk chain the op computing its base from two leaf sets (one
    matrix-vector product after the links' gather) and the root op reading only the chain's
    output (into the final einsum): two ops fewer on a right-linear circuit. The same sums of
    products, reordered."""
    drop: set[int] = set()
    for ci, st in enumerate(steps):
        if st[0] is not None or len(st[4]) != 1:
            continue
        _, out, m, stacked, chunks, base_rows, v_lo, v_hi, _, _ = st
        rows, w, c, flags, subs, renorm_v, tab = chunks[0]
        base_fold = root_fold = None
        for bi in range(ci):
            b = steps[bi]
            if (b[0] is True and b[4] == 1 and b[5] == 2 and not b[8] and b[1] <= base_rows.min()
                    and base_rows.max() < b[1] + b[2] and (b[6] < tp.n_leaves).all()):
                wb = b[7][0]                               # (m_b, q): rows b.out + mo
                pairs = np.ascontiguousarray(b[6][:, 0])          # (2, q) leaf rows
                base_fold = (np.ascontiguousarray(wb[base_rows - b[1]]), pairs,
                             np.concatenate([rows.ravel(), pairs.ravel()]))
                drop.add(bi)
                break
        last = steps[-1]
        if (ci == len(steps) - 2 and not renorm_v and last[0] is True and last[2] == 1
                and last[4] == 1 and last[5] == 1 and last[1] == tp.root_row
                and (last[6] >= out).all() and (last[6] < out + m).all()):
            wm = np.zeros(m)
            np.add.at(wm, last[6][0, 0] - out, last[7][0, 0])
            root_fold = (wm, tp.root_row)
            drop.add(len(steps) - 1)
        if base_fold is None and root_fold is None:
            continue
        if root_fold is not None:
            subs = "i," + subs.partition("->")[0] + "->b"
        steps[ci] = (None, out, m, stacked, ((rows, w, c, flags, subs, renorm_v, tab),),
                     base_rows, v_lo, v_hi, base_fold, root_fold)
    return [st for i, st in enumerate(steps) if i not in drop]


def _state_tables(steps: list[tuple], tp: ThinPlan) -> list[tuple]:
    """Give each chain chunk whose links each read the leaves of one variable a table of its
    link matrices for every state of that variable (and, on a folded base, of the base's leaf
    values): at run time one gather from the states replaces filling the leaf rows, gathering
    them and contracting them with the weights. The same sums of products, done at plan time.

    A chunk keeps ``None`` (the leaf-row route) when a link mixes variables, when the table would
    be over twice the size of the link weights (``S + 1 > 2 f``), or without ``leaf_var``.
    O(links x m^2 x S) once.
    """
    if tp.leaf_var is None:
        return steps
    s1 = tp.n_states + 1
    table2 = tp.leaf_table.reshape(tp.n_leaves, s1)
    out_steps = []
    for st in steps:
        if st[0] is not None:
            out_steps.append(st)
            continue
        _, out, m, stacked, chunks, base_rows, v_lo, v_hi, base_fold, root_fold = st
        new_chunks = []
        for ci, (rows, w, c, flags, subs, renorm_v, _) in enumerate(chunks):
            tab = None
            lrows = rows if stacked else rows.T            # (P, f)
            p_n, f = lrows.shape
            pad = lrows == tp.n_rows                        # the constant-one row
            real = ~pad.any(axis=1)
            if (s1 <= 2 * f and (pad.all(axis=1) | real).all() and real.any()
                    and (lrows[real] < tp.n_leaves).all()):
                var = np.zeros(p_n, dtype=np.int64)
                lv = tp.leaf_var[np.where(pad, 0, lrows)]  # (P, f)
                if (lv[real] == lv[real][:, :1]).all():
                    var[real] = lv[real, 0]
                    vals = np.ones((p_n, f, s1))
                    vals[real] = table2[lrows[real]]
                    if stacked:                             # w (P, f, m m) -> (P, m m, S + 1)
                        mats = np.einsum("pfx,pfs->pxs", w, vals)
                    else:                                   # w (f, m, m, P) -> (m, m, P, S + 1)
                        mats = np.einsum("fmcp,pfs->mcps", w, vals)
                    n_mat = mats.size // s1
                    svar = (np.repeat(var, m * m) if stacked else np.tile(var, m * m))
                    parts, offs, svars = [mats.reshape(-1)], [np.arange(n_mat) * s1 + 1], [svar]
                    if base_fold is not None and ci == 0:
                        pairs = base_fold[1].reshape(-1)    # (2 q,) leaf rows
                        parts.append(table2[pairs].reshape(-1))
                        offs.append(mats.size + np.arange(pairs.size) * s1 + 1)
                        svars.append(tp.leaf_var[pairs])
                    tab = (np.concatenate(svars), np.concatenate(offs)[:, None],
                           np.concatenate(parts), n_mat)
            new_chunks.append((rows, w, c, flags, subs, renorm_v, tab))
        out_steps.append((None, out, m, stacked, tuple(new_chunks), base_rows, v_lo, v_hi,
                          base_fold, root_fold))
    return out_steps


def _chain_schedule(lo: float, hi: float, depth: int, c: int, s_r: float, s: float,
                    log_m: float, base: tuple[float, float]
                    ) -> tuple[tuple[bool, ...], float, float] | None:
    """Which of the ``depth + 1`` tree levels of one chunk renormalise, and log-bounds on the
    units of the resulting vector; None if unsafe.

    ``lo, hi``: log-bounds on the row sums of the level-0 links; a product's row sums are
    within the products of its factors' (``[2 lo, 2 hi]``, or those of a factor when paired
    with a padding identity); a renormalised level has row sums in ``[exp(-s_r), m]``. Every
    entry is >= its matrix maximum x exp(-s) >= (min row sum / m) x exp(-s), which must stay
    above exp(-_LEAN_LIMIT) at the next level and in the final product of the ``c`` remaining
    matrices with the base vector (log-bounds ``base`` on its maximum).
    """
    flags = []
    for level in range(depth + 1):
        last = level == depth
        k = c if last else 2
        b_lo, b_hi = base if last else (0.0, 0.0)

        def unsafe(lo_: float, hi_: float) -> bool:
            return (min(k * lo_, lo_, 0.0) - log_m - s + b_lo < -_LEAN_LIMIT
                    or max(k * hi_, hi_, 0.0) + b_hi > _LEAN_LIMIT)

        flag = unsafe(lo, hi)
        if flag:
            lo, hi = -s_r, log_m
            if unsafe(lo, hi):
                return None
        flags.append(flag)
        if last:
            return (tuple(flags), min(c * lo, lo, 0.0) - log_m - s + b_lo,
                    max(c * hi, hi, 0.0) + b_hi)
        lo, hi = min(2 * lo, lo, 0.0), max(2 * hi, hi, 0.0)
    raise AssertionError("unreachable")


def _lean_chain(op: _TChain, table: np.ndarray, one_row: int, base: tuple[float, float],
                span: float) -> tuple | None:
    """The chain step: static chunks in bit-reversed order and their renormalisation levels.

    O(L m^2 f) once; None when the bounds cannot be kept within ``_LEAN_LIMIT``.

    Links are split (bottom first) into chunks of ``c 2^k`` links (``c`` = 1; or 3, 5, 7 for
    width 2 and 3 for width 4, whichever pads least and is safe), the last one padded with
    identity links (leaf rows: the constant-one row ``one_row``; weight 1 on the diagonal for the
    first leaf, 0 elsewhere, so the padded matrix is exactly I). ``k`` halving levels leave ``c`` matrices, multiplied into the
    base vector by one einsum. Stored with the offset inside each group of ``2^k`` bit-reversed,
    the adjacent pairs ``(2i, 2i + 1)`` of every level are the two contiguous halves.
    ``table`` is the ``(n_leaves, S + 1)`` leaf table, ``base`` the log-bounds on the maximum of
    the block below the chain; the chain's output is renormalised unless its bounds stay within
    ``[-span, span]`` (they are the step's last two items).
    """
    w = op.w[..., 0]                               # (m, m, f, L): [mo, c, f, l]
    m, f, n_links = w.shape[0], w.shape[2], w.shape[3]
    lw = np.log(w)
    s_r = float((lw.max(axis=0) - lw.min(axis=0)).max())     # down a column (mo varies)
    s_c = float((lw.max(axis=1) - lw.min(axis=1)).max())     # along a row (c varies)
    s = s_r + s_c
    # each link's leaf set: its maximum over the leaves, for every state (zero: exactly zero)
    top = table[op.leaf_rows].max(axis=0)          # (L, S + 1)
    pos = np.where(top > 0, top, np.inf).min(axis=1)
    if not np.isfinite(pos).any():
        return None
    pos = np.where(np.isfinite(pos), pos, 1.0)
    w_col = w.sum(axis=1)                          # (m, f, L): sum over c
    lo = float(np.log(w_col.min(axis=(0, 1)) * pos).min())   # min row sum of a link
    hi = float(np.log(w_col.sum(axis=1).max(axis=0) * top.max(axis=1)).max())
    log_m = float(np.log(m))
    if not np.isfinite(hi):
        hi = 0.0
    per = m * m * max(m, f) * THIN_MAX_BATCH
    size = 1 << max(1, (max(2, _CHUNK_ELEMENTS // per)).bit_length() - 1)
    stacked = m > 2
    chunks = []
    for end in range(n_links, 0, -size):           # bottom chunk first
        start = max(0, end - size)
        n = end - start
        shapes = [(1, (n - 1).bit_length())]       # (c, k): c 2^k >= n links
        for odd in _LEAN_ODD[:len(_LEAN_ODD) if m <= 2 else 1 if m <= 4 else 0]:
            if n >= odd:
                shapes.append((odd, max(0, (-(-n // odd) - 1).bit_length())))
        # least padding first; c = 1 last among equals (its final product is the safest)
        shapes.sort(key=lambda ck: (ck[0] << ck[1], -ck[0]))
        shapes.append((1, (n - 1).bit_length()))
        for c, k in shapes:
            sched = _chain_schedule(lo, hi, k, c, s_r, s, log_m, base if end == n_links
                                    else (0.0, 0.0))
            if sched is not None:
                break
        else:
            return None
        p = c << k
        flags, v_lo, v_hi = sched
        renorm_v = start > 0 or v_lo < -span or v_hi > span
        if renorm_v:
            v_lo = v_hi = 0.0
        # stored position of logical link g 2^k + t: bitrev_k(t) c + g
        logical = np.arange(p)
        g, t = logical >> k, logical & ((1 << k) - 1)
        rev = np.zeros(p, dtype=np.int64)
        for b in range(k):
            rev |= ((t >> b) & 1) << (k - 1 - b)
        order = np.empty(p, dtype=np.int64)        # stored position -> logical link
        order[rev * c + g] = logical
        rows = np.full((f, p), one_row, dtype=np.int64)
        rows[:, :n] = op.leaf_rows[:, start:end]
        ws = np.zeros((f, m, m, p))
        ws[0, :, :, n:] = np.eye(m)[:, :, None]
        ws[:, :, :, :n] = w[:, :, :, start:end].transpose(2, 0, 1, 3)
        rows, ws = rows[:, order], ws[..., order]
        # the last c matrices times the vector: "ikb,klb,...,jb->ib" (stacked: "bik,...")
        ix = "iklmnopq"[:c] + "j"
        subs = ",".join((f"b{ix[i]}{ix[i + 1]}" if stacked else f"{ix[i]}{ix[i + 1]}b")
                        for i in range(c)) + ",jb->ib"
        if stacked:                                # gathers (P, f), weights (P, f, m m)
            chunks.append((np.ascontiguousarray(rows.T),
                           np.ascontiguousarray(ws.transpose(3, 0, 1, 2).reshape(p, f, m * m)),
                           c, flags, subs, renorm_v, None))
        else:                                      # gathers (f, P), weights (f, m, m, P)
            chunks.append((np.ascontiguousarray(rows), np.ascontiguousarray(ws), c, flags,
                           subs, renorm_v, None))
    return (None, op.out, m, stacked, tuple(chunks), op.base_rows, v_lo, v_hi, None, None)


def _lean_chain_run(vals: np.ndarray, states: np.ndarray, step: tuple, batch: int,
                    divisors: list) -> None:
    """One chain step: chunk by chunk from the bottom, the tree of halves, then the final
    einsum; appends each divisor to ``divisors``. O(L m^3 B) arithmetic, O(log L) calls."""
    _, out, m, stacked, chunks, base_rows, _, _, base_fold, root_fold = step
    einsum, maxr = _einsum, np.maximum.reduce
    g = gb = v = None
    if base_fold is None:
        v = vals.take(base_rows, axis=0)                        # (m, B)
    elif chunks[0][6] is None:     # the base block's op: weights (m, q), leaf pairs; one gather
        both = vals.take(base_fold[2], axis=0)                  # with the links'
        n_links = chunks[0][0].size
        g = both[:n_links].reshape(chunks[0][0].shape + (batch,))
        gb = both[n_links:].reshape(2, -1, batch)               # (2, q, B)
    for rows, w, c, flags, subs, renorm_v, tab in chunks:
        p = rows.shape[0] if stacked else rows.shape[1]
        if tab is not None:                        # link matrices looked up by state
            t = states.take(tab[0], axis=0)
            t += tab[1]
            t = tab[2].take(t)                     # (E, B)
            n_mat = tab[3]
            if stacked:                            # (P, B, m, m)
                mats = t[:n_mat].reshape(p, m, m, batch).transpose(0, 3, 1, 2)
            else:                                  # (m, m, P, B)
                mats = t[:n_mat].reshape(m, m, p, batch)
            if v is None:
                gb = t[n_mat:].reshape(2, -1, batch)
        else:
            if g is None:
                g = vals.take(rows, axis=0)        # (P, f, B) stacked, else (f, P, B)
            if stacked:                            # (P, B, m, m)
                mats = np.matmul(g.transpose(0, 2, 1), w).reshape(p, batch, m, m)
            else:                                  # (m, m, P, B)
                mats = einsum("fmcp,fpb->mcpb", w, g)
        if v is None:                              # the folded base: (m, q) @ (q, B)
            v = np.matmul(base_fold[0], np.multiply(gb[0], gb[1]))
        level = 0
        while True:
            if flags[level]:
                if stacked:
                    mx = maxr(mats.reshape(p, batch, m * m), 2)   # (P, B)
                    np.maximum(mx, _TINY, out=mx)
                    mats /= mx[:, :, None, None]
                else:
                    mx = maxr(mats.reshape(m * m, p, batch), 0)
                    np.maximum(mx, _TINY, out=mx)
                    mats /= mx
                divisors.append(mx)
            if p == c:
                break
            p //= 2                                # left factors first half, right second
            if stacked:
                mats = np.matmul(mats[:p], mats[p:])
            else:
                mats = einsum("iklb,kjlb->ijlb", mats[:, :, :p], mats[:, :, p:])
            level += 1
        head: list = []
        if root_fold is not None:          # the root op: weights (m,) on the chain's output
            head, dest = [root_fold[0]], vals[root_fold[1]]
        else:                              # a fresh array when it is renormalised below
            dest = np.empty((m, batch)) if renorm_v else vals[out:out + m]
        # (m, B), or (B,): the root
        r = einsum(subs, *head, *(mats if stacked else mats.transpose(2, 0, 1, 3)), v, out=dest)
        if renorm_v:
            mx = maxr(r, 0)
            np.maximum(mx, _TINY, out=mx)
            r = np.divide(r, mx, out=vals[out:out + m])
            divisors.append(mx[None])
        v = r
        g = None


def _lean_root_log_values(tp: ThinPlan, vals: np.ndarray, batch: int,
                          states: np.ndarray) -> np.ndarray:
    """Run the lean program on ``vals`` whose leaf rows are filled (unless the program reads
    only ``states``, the ``(n_variables, B)`` states); root log-values ``(B,)``.

    O(n_edges x batch) arithmetic in 2-3 numpy calls per op (3 more where it renormalises)
    and 2-3 per chain tree level.
    """
    divisors: list[np.ndarray] = []
    max_reduce, multiply, multiply_reduce = np.maximum.reduce, np.multiply, np.multiply.reduce
    matmul, einsum = np.matmul, _einsum
    for step in tp.lean.steps:
        mm = step[0]
        if mm is None:
            _lean_chain_run(vals, states, step, batch, divisors)
            continue
        _, out, m, q, j_n, n_in, idx, w, renorm = step
        slab = vals[out:out + m * j_n].reshape(m, j_n, batch)
        jstep = j_n if m * q * j_n * batch <= _CHUNK_ELEMENTS else \
            max(1, _CHUNK_ELEMENTS // (m * q * batch))
        for j0 in range(0, j_n, jstep):
            if jstep == j_n:
                ix, wj, dest = idx, w, slab
            else:
                j1 = min(j_n, j0 + jstep)
                dest = slab[:, j0:j1]
                ix, wj = ((idx[:, j0:j1], w[j0:j1]) if mm is True else
                          (idx[..., j0:j1], w[..., j0:j1]))
            g = vals.take(ix, axis=0)   # (s, J, q, B) matmul, (2, k, J, B) sets, else (s, q, J, B)
            if mm == "sets":                                    # weights (m, k, k, J)
                einsum("marj,ajb,rjb->mjb", wj, g[0], g[1], out=dest)
            else:
                p = g[0] if n_in == 1 else multiply(g[0], g[1], out=g[0]) if n_in == 2 else \
                    multiply_reduce(g, 0)
                if mm:
                    matmul(wj, p, out=dest.transpose(1, 0, 2))  # (J, m, q) @ (J, q, B)
                else:
                    einsum("qmj,qjb->mjb", wj, p, out=dest)    # sum_q (q, m, J) (q, J, B)
            if renorm:
                mx = max_reduce(dest, 0)                        # (J, B)
                np.maximum(mx, _TINY, out=mx)
                np.divide(dest, mx, out=dest)
                divisors.append(mx)
    root = vals[tp.root_row]
    if np.minimum.reduce(root) > 0:
        out = np.log(root)
    else:
        with np.errstate(divide="ignore"):        # a zero root (zero block): -inf
            out = np.log(root)
    if divisors:
        div = divisors[0] if len(divisors) == 1 else np.concatenate(divisors)
        out += np.add.reduce(np.log(div), 0)
    return out


def root_log_values_from_states(rplan: RegionPlan, plan: Any, states: np.ndarray) -> np.ndarray:
    """Root log-values ``(batch,)`` from ``(n_variables, batch)`` int64 states (-1 = free).

    Picks the cheapest exact route: a K = 1 circuit is a weighted sum of leaf logs (one dot
    product); a thin batch (< ``THIN_MAX_BATCH`` columns) with states in range uses the
    stack-last linear-space engine; anything else the log-space region ops.
    """
    batch = states.shape[1]
    if rplan.log_linear is not None:
        from model_zoo.circuit.core import _leaf_rows

        ll: LogLinearPlan = rplan.log_linear
        leaf = _leaf_rows(plan, states, "sum")
        if ll.leaves is not None:
            leaf = leaf[ll.leaves]
        with np.errstate(invalid="ignore"):
            return ll.const + ll.coef @ leaf
    tp: ThinPlan | None = rplan.thin
    if tp is not None and batch < THIN_MAX_BATCH and states.size:
        # -1 <= state < n_states (two reductions, no temporary)
        if (np.maximum.reduce(states, axis=None) < tp.n_states
                and np.minimum.reduce(states, axis=None) >= -1):
            return thin_root_log_values(tp, plan.leaf_var, states)
    from model_zoo.circuit.core import _leaf_rows

    return root_log_values(rplan, _leaf_rows(plan, states, "sum"))
