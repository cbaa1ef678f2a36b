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

__all__ = ["region_plan", "root_log_values"]

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
    return RegionPlan(n_rows=next_row, n_leaves=n_leaves, ops=tuple(final), root_row=root_row,
                      n_chains=len(chains), n_chain_links=n_links)


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
