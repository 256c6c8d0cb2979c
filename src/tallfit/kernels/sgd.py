"""Numba kernels of the iterative solvers, each beside a plain-numpy reference for tests.

``gradient_products``: for one block, Xᵀ(XW − [y, 0, …]) and the column sums of squares of
XW − [y, 0, …], i.e. the gradient sums at a point and Gram-vector products with directions, in
row tiles that stay in cache between the two sweeps; single-threaded and GIL-free, so it runs
beside the reader thread (multi-threaded BLAS for these narrow products was measured 20-60×
slower on this machine while another thread decodes). Reference: ``gradient_products_reference``.

``sgd_block``: mini-batch SGD over one block of rows.

For each mini-batch B (rows ``order[s : s + m]`` of the block, standardised on the fly as
z = (x − shift)·inv_scale), with the loss ½‖Zc − y‖²/|B| and an optional L2 penalty
½λ‖mask·c‖²:

    g = Z_Bᵀ(Z_B c − y_B)/|B| + λ·mask·c
    v ← μ v − η_t g,   c ← c + v                         (heavy-ball momentum μ; μ = 0: plain SGD)
    c̄ ← c̄ + (c − c̄)/N  when averaging                   (Polyak & Juditsky, SIAM J. Control
                                                             Optim. 30, 1992)

with η_t = η₀ (constant) or η₀/(1 + decay·t)^power (inverse scaling), t the global step count.
``state`` carries [t, N, Σ mini-batch losses at the pre-update iterate, steps in this call]
between calls. The last mini-batch of a block may be shorter.
"""

from __future__ import annotations

import numba
import numpy as np

CONSTANT, INVERSE = 0, 1
TILE_ROWS = 2048  # 2048 rows × 21 columns ≈ 340 KB: the tile stays in L2 between the two sweeps


@numba.njit(cache=True, nogil=True)
def _dot8(a, b, n):
    """Σ a[i]·b[i] over i < n with eight independent partial sums (room for SIMD, fixed order)."""
    part = np.zeros(8)
    nb = n - n % 8
    for i in range(0, nb, 8):
        for u in range(8):
            part[u] += a[i + u] * b[i + u]
    acc = part.sum()
    for i in range(nb, n):
        acc += a[i] * b[i]
    return acc


@numba.njit(cache=True, nogil=True)
def gradient_products(X, y, W, G, ss):
    """G += Xᵀ E and ss += Σ E², with E = X W and y subtracted from E's first column."""
    m, p = X.shape
    k = W.shape[1]
    E = np.empty((k, TILE_ROWS))
    for start in range(0, m, TILE_ROWS):
        nt = min(TILE_ROWS, m - start)
        for c in range(k):
            Ec = E[c]
            Ec[:nt] = 0.0
            for j in range(p):
                w = W[j, c]
                Xj = X[start : start + nt, j]
                for i in range(nt):
                    Ec[i] += Xj[i] * w
        for i in range(nt):
            E[0, i] -= y[start + i]
        for c in range(k):
            Ec = E[c]
            ss[c] += _dot8(Ec, Ec, nt)
            for j in range(p):
                G[j, c] += _dot8(X[start : start + nt, j], Ec, nt)


def gradient_products_reference(X, y, W, G, ss):
    """The same sums as :func:`gradient_products` with numpy's matrix products."""
    E = X @ W
    E[:, 0] -= y
    G += X.T @ E
    ss += np.einsum("ij,ij->j", E, E)


@numba.njit(cache=True, nogil=True)
def _rate(eta0, schedule, decay, power, t):
    if schedule == INVERSE:
        return eta0 / (1.0 + decay * t) ** power
    return eta0


@numba.njit(cache=True, nogil=True)
def sgd_block(X, y, order, shift, inv_scale, c, v, cbar, state, batch_size, eta0, schedule, decay, power,
              momentum, l2, mask, averaging, trace):
    """Run the mini-batches of one block in place on c, v, cbar, state; rows of ``trace`` (if any)
    receive c after each step."""
    m = order.shape[0]
    p = c.shape[0]
    z = np.empty((batch_size, p))
    r = np.empty(batch_size)
    g = np.empty(p)
    start = 0
    while start < m:
        stop = min(start + batch_size, m)
        nb = stop - start
        loss = 0.0
        for i in range(nb):
            row = order[start + i]
            acc = 0.0
            for j in range(p):
                zij = (X[row, j] - shift[j]) * inv_scale[j]
                z[i, j] = zij
                acc += zij * c[j]
            ri = acc - y[row]
            r[i] = ri
            loss += ri * ri
        for j in range(p):
            g[j] = 0.0
        for i in range(nb):
            ri = r[i]
            for j in range(p):
                g[j] += z[i, j] * ri
        eta = _rate(eta0, schedule, decay, power, state[0])
        for j in range(p):
            gj = g[j] / nb + l2 * mask[j] * c[j]
            v[j] = momentum * v[j] - eta * gj
            c[j] += v[j]
        state[0] += 1.0
        state[2] += 0.5 * loss / nb
        if averaging:
            state[1] += 1.0
            w = 1.0 / state[1]
            for j in range(p):
                cbar[j] += (c[j] - cbar[j]) * w
        k = int(state[3])
        if k < trace.shape[0]:
            for j in range(p):
                trace[k, j] = c[j]
        state[3] += 1.0
        start = stop


def sgd_block_reference(X, y, order, shift, inv_scale, c, v, cbar, state, batch_size, eta0, schedule, decay,
                        power, momentum, l2, mask, averaging, trace):
    """The same steps as :func:`sgd_block` in plain numpy (one mini-batch at a time)."""
    m = order.shape[0]
    for start in range(0, m, batch_size):
        rows = order[start : start + batch_size]
        Z = (X[rows, :] - shift) * inv_scale
        r = Z @ c - y[rows]
        eta = eta0 if schedule == CONSTANT else eta0 / (1.0 + decay * state[0]) ** power
        g = Z.T @ r / len(rows) + l2 * mask * c
        v[:] = momentum * v - eta * g
        c += v
        state[0] += 1.0
        state[2] += 0.5 * float(r @ r) / len(rows)
        if averaging:
            state[1] += 1.0
            cbar += (c - cbar) / state[1]
        k = int(state[3])
        if k < trace.shape[0]:
            trace[k] = c
        state[3] += 1.0


@numba.njit(cache=True, nogil=True)
def _next(state):
    """SplitMix64 (Steele, Lea & Flood, OOPSLA 2014): the next state and a 64-bit draw."""
    state = state + np.uint64(0x9E3779B97F4A7C15)
    z = state
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return state, z ^ (z >> np.uint64(31))


@numba.njit(cache=True, nogil=True)
def _shuffle(a, lo, hi, state):
    """Fisher–Yates shuffle of a[lo:hi] in place; returns the generator state."""
    for i in range(hi - 1, lo, -1):
        state, r = _next(state)
        j = lo + np.int64(r % np.uint64(i - lo + 1))
        t = a[i]
        a[i] = a[j]
        a[j] = t
    return state


@numba.njit(cache=True, nogil=True)
def window_order(m, window, seed):
    """Rows 0..m-1 with the windows of `window` consecutive rows in a random order and the rows
    within each window shuffled (the tail after the last whole window too), from one seed."""
    state = np.uint64(seed)
    nt = m // window
    wins = np.arange(nt)
    state = _shuffle(wins, 0, nt, state)
    order = np.empty(m, dtype=np.int64)
    for t in range(nt):
        base = wins[t] * window
        for u in range(window):
            order[t * window + u] = base + u
        state = _shuffle(order, t * window, (t + 1) * window, state)
    for i in range(nt * window, m):
        order[i] = i
    _shuffle(order, nt * window, m, state)
    return order
