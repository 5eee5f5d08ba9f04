"""Weighted isotonic (non-decreasing) regression of many rows at once."""

import numpy as np

__all__ = []


def isotonic_rows(y, w, max_cells=1_000_000):
    """Weighted least-squares non-decreasing fit of each row of ``y`` (shape (n, K)).

    Uses the min-max formula of isotonic regression,
    ``f_k = max_{i<=k} min_{j>=k} mean_w(y[i..j])`` (Barlow et al. 1972, Statistical
    Inference under Order Restrictions, Thm 1.4), vectorised over rows with cumulative
    sums: O(K^2) per row, which is cheap for the tens of distance edges of a model.
    Rows that are already non-decreasing are returned unchanged without work. Rows are
    processed in chunks of about ``max_cells`` (row, i, j) cells, which keeps the working
    arrays in the CPU cache.
    """
    y = np.asarray(y, float)
    w = np.asarray(w, float)
    out = y.copy()
    if y.shape[1] < 2:
        return out
    bad = np.nonzero(np.any(np.diff(y, axis=1) < 0, axis=1))[0]
    if bad.size == 0:
        return out
    K = y.shape[1]
    chunk = max(1, max_cells // (K * K))
    iu = np.triu(np.ones((K, K), bool))
    for start in range(0, bad.size, chunk):  # loop over chunks of rows, not over rows
        rows = bad[start:start + chunk]
        yy, ww = y[rows], np.maximum(w[rows], 1e-300)
        cw = np.concatenate([np.zeros((rows.size, 1)), np.cumsum(ww, axis=1)], axis=1)
        cy = np.concatenate([np.zeros((rows.size, 1)), np.cumsum(ww * yy, axis=1)], axis=1)
        # M[r, i, j] = weighted mean of y[i..j] for i <= j
        num = cy[:, None, 1:] - cy[:, :-1, None]
        den = cw[:, None, 1:] - cw[:, :-1, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            M = np.where(iu, num / den, np.inf)
        # C[r, i, k] = min_{j >= k} M[r, i, j]
        C = np.minimum.accumulate(M[:, :, ::-1], axis=2)[:, :, ::-1]
        C = np.where(iu, C, -np.inf)  # only i <= k
        out[rows] = C.max(axis=1)
    return out
