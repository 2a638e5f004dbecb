"""Encoding of a batch of rows into the feature matrix the fair space is learned on (pure numpy).

The embed stage turns Arrow columns into numpy arrays (numeric columns as float64, categorical
columns as level codes in the scan's level order) and hands them here.
"""

import numpy as np
import scipy.sparse as sp


def feature_names(numeric, categorical, levels):
    """Encoded feature names: the numeric columns, then ``col=level`` for every categorical level."""
    names = list(numeric)
    for c in categorical:
        names += [f"{c}={v}" for v in levels[c]]
    return names


def encode(numeric, codes, sizes, rows):
    """Feature matrix (rows, p): the numeric columns as they are, then each categorical column
    one-hot over its ``sizes[j]`` levels (``codes[j]`` in 0..sizes[j]-1; -1 for a level outside
    them, which gets no indicator: all of the feature's columns 0).

    Reference: sklearn's OneHotEncoder with the same categories (handle_unknown="ignore") beside
    the numeric columns (tests/kernels/test_encoding.py)."""
    parts = [np.column_stack([np.asarray(v, dtype=np.float64) for v in numeric])] if numeric else []
    for cc, size in zip(codes, sizes):
        cc = np.asarray(cc)
        known = np.nonzero(cc >= 0)[0]
        oh = np.zeros((rows, size))
        oh[known, cc[known]] = 1.0
        parts.append(oh)
    return np.hstack(parts)


def indicators(codes, sizes, rows):
    """Sparse (rows, sum(sizes)) 0/1 matrix with one column per level of every protected attribute
    (``codes[j]`` the level codes of attribute j)."""
    if not codes:
        return sp.csr_matrix((rows, 0))
    if any(np.any(np.asarray(cc) < 0) for cc in codes):
        raise ValueError("a protected attribute has a level the scan did not count (did the input change?)")
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    cols = np.concatenate([np.asarray(cc, dtype=np.int64) + off for cc, off in zip(codes, offsets)])
    r = np.tile(np.arange(rows), len(codes))
    return sp.csr_matrix((np.ones(len(cols)), (r, cols)), shape=(rows, int(sum(sizes))))


def weight_vector(names, weights):
    """Per encoded feature weight: ``weights[col]`` for a numeric column, every position of a list
    column and every level of a categorical one, 1 elsewhere."""
    out = np.ones(len(names))
    for f, w in weights.items():
        for i, name in enumerate(names):
            if name == f or name.startswith((f + "=", f + "[")):
                out[i] = w
    return out
