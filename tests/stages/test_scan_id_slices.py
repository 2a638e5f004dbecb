"""The scan's distinct-id count cut into hash slices (bounded DuckDB memory on large tables) against
numpy.unique on the same ids."""

import numpy as np
import pyarrow as pa
import pytest

from bigsmooth.stages import scan
from bigsmooth.table import connect


@pytest.mark.parametrize("kind", ["int", "str"])
def test_sliced_distinct_id_count_equals_numpy_unique(rng, kind):
    ids = rng.integers(0, 30_000, 50_000)  # about 15,000 ids repeated
    values = ids if kind == "int" else np.array([f"id-{v:06d}" for v in ids])
    con = connect()
    con.register("t", pa.table({"id": values}))
    # a 256 MiB budget holds 335,544 ids per slice; 3,000,000 rows therefore make 9 slices
    slices = scan._id_slices('"id"', 3_000_000, 256)
    assert len(slices) == 9
    assert scan._id_slices('"id"', 300_000, 256) == ["true"]
    got = sum(con.execute(f"SELECT count(DISTINCT id) FROM t WHERE {w}").fetchone()[0] for w in slices)
    assert got == len(np.unique(values))  # numpy.unique: the distinct ids
    # every row falls in exactly one slice
    rows = sum(con.execute(f"SELECT count(*) FROM t WHERE {w}").fetchone()[0] for w in slices)
    assert rows == len(values)
