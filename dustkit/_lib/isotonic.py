"""Weighted isotonic (non-decreasing) regression of many rows at once."""

import numpy as np

__all__ = ["isotonic_rows"]


def isotonic_rows(y, w):
    """Weighted least-squares non-decreasing fit of each row of ``y`` (shape (n, K)).

    The pool-adjacent-violators algorithm (Barlow et al. 1972, Statistical Inference under
    Order Restrictions, ch. 1), run on all rows at once: the columns are visited left to
    right, each row keeps a stack of pooled blocks (weighted mean, weight, number of
    columns), and while the top two blocks of any row are out of order they are pooled,
    for all such rows together. The loops run over the few tens of distance edges and the
    pooling steps, never over rows. Rows that are already non-decreasing are returned
    unchanged without work.
    """
    y = np.asarray(y, float)
    w = np.asarray(w, float)
    out = y.copy()
    if y.ndim != 2 or y.shape[1] < 2:
        return out
    bad = np.nonzero(np.any(np.diff(y, axis=1) < 0, axis=1))[0]
    if bad.size == 0:
        return out
    n, K = bad.size, y.shape[1]
    yy = y[bad]
    ww = np.maximum(w[bad], 1e-300)
    mean = np.empty((n, K))  # each row's stack of blocks, bottom first
    weight = np.empty((n, K))
    size = np.zeros((n, K), dtype=np.int64)  # columns in each block
    top = np.full(n, -1)
    rows = np.arange(n)
    fm, fw, fs = mean.ravel(), weight.ravel(), size.ravel()
    for k in range(K):  # loop over columns (distance edges)
        top += 1
        mean[rows, top] = yy[:, k]
        weight[rows, top] = ww[:, k]
        size[rows, top] = 1
        active = rows
        while True:  # pool the top two blocks wherever they are out of order
            active = active[top[active] > 0]
            hi = active * K + top[active]
            viol = fm[hi - 1] > fm[hi]
            if not viol.any():
                break
            active, hi = active[viol], hi[viol]
            wsum = fw[hi - 1] + fw[hi]
            fm[hi - 1] = (fw[hi - 1] * fm[hi - 1] + fw[hi] * fm[hi]) / wsum
            fw[hi - 1] = wsum
            fs[hi - 1] += fs[hi]
            top[active] -= 1
    # back to columns: mark where each block starts, number the blocks along the row
    size[np.arange(K)[None, :] > top[:, None]] = 0
    start = np.cumsum(size, axis=1) - size
    mark = np.zeros((n, K + 1), dtype=np.int64)
    live = size > 0
    np.add.at(mark, (np.nonzero(live)[0], start[live]), 1)
    block = np.cumsum(mark[:, :K], axis=1) - 1
    out[bad] = np.take_along_axis(mean, block, axis=1)
    return out
