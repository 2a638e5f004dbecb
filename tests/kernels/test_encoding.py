"""The embed stage's encoding (bigsmooth.kernels.encoding) against scikit-learn's OneHotEncoder."""

import numpy as np
from sklearn.preprocessing import OneHotEncoder

from bigsmooth.kernels import encoding


def test_encode_equals_numeric_columns_beside_sklearn_one_hot(rng):
    rows = 500
    numeric = [rng.normal(size=rows), rng.integers(0, 9, rows)]
    sizes = [3, 5]
    codes = [rng.integers(0, s, rows) for s in sizes]
    got = encoding.encode(numeric, codes, sizes, rows)
    enc = OneHotEncoder(categories=[list(range(s)) for s in sizes], sparse_output=False)
    want = np.hstack([np.column_stack(numeric).astype(float), enc.fit_transform(np.column_stack(codes))])
    np.testing.assert_array_equal(got, want)
    assert encoding.encode([], codes, sizes, rows).shape == (rows, 8)


def test_an_unknown_level_gets_no_indicator_as_in_sklearn(rng):
    # reference: OneHotEncoder(handle_unknown="ignore") encodes an unknown category as all zeros
    rows, sizes = 200, [3, 4]
    codes = [rng.integers(0, s, rows) for s in sizes]
    raw = [c.copy() for c in codes]
    codes[0][[5, 17]] = -1
    raw[0][[5, 17]] = 99  # a level the encoder was not given
    enc = OneHotEncoder(
        categories=[list(range(s)) for s in sizes], sparse_output=False, handle_unknown="ignore"
    )
    want = enc.fit(np.column_stack([np.arange(rows) % 3, np.arange(rows) % 4])).transform(
        np.column_stack(raw)
    )
    np.testing.assert_array_equal(encoding.encode([], codes, sizes, rows), want)


def test_indicators_equal_sklearn_one_hot_of_every_attribute(rng):
    rows, sizes = 300, [2, 4, 3]
    codes = [rng.integers(0, s, rows) for s in sizes]
    S = encoding.indicators(codes, sizes, rows)
    enc = OneHotEncoder(categories=[list(range(s)) for s in sizes], sparse_output=False)
    np.testing.assert_array_equal(S.toarray(), enc.fit_transform(np.column_stack(codes)))
    assert encoding.indicators([], [], 7).shape == (7, 0)


def test_feature_names_and_weights_cover_every_level():
    names = encoding.feature_names(["income"], ["job"], {"job": ["a", "b"]})
    assert names == ["income", "job=a", "job=b"]
    np.testing.assert_array_equal(encoding.weight_vector(names, {"job": 2.0}), [1.0, 2.0, 2.0])
    np.testing.assert_array_equal(encoding.weight_vector(names, {"income": 0.5}), [0.5, 1.0, 1.0])
