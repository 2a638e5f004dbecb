"""order: a locality ordering of the rows so that most edge weight falls inside solver blocks.

Uses reverse Cuthill-McKee on the graph (scipy.sparse.csgraph), which clusters connected rows into
nearby positions; the solver's blocks are consecutive ranges of this ordering.
"""
import logging
import os

import numpy as np
from scipy.sparse.csgraph import reverse_cuthill_mckee

from .. import atomic
from .graph import load_graph

log = logging.getLogger("bigsmooth.order")


def inside_share(W, perm, block_rows):
    """Share of edge weight whose two ends fall in the same block of ``block_rows`` under ``perm``."""
    pos = np.empty_like(perm)
    pos[perm] = np.arange(len(perm))
    blk = pos // block_rows
    Wc = W.tocoo()
    total = Wc.data.sum()
    return float(Wc.data[blk[Wc.row] == blk[Wc.col]].sum() / total) if total > 0 else 1.0


def run(rundir, cfg):
    W = load_graph(rundir, mmap=False)
    perm = np.asarray(reverse_cuthill_mckee(W, symmetric_mode=True), dtype=np.int64)
    atomic.save_npy(os.path.join(rundir.stage_dir("order"), "order.npy"), perm)
    br = cfg["solve"]["block_rows"]
    share = inside_share(W, perm, br)
    base = inside_share(W, np.arange(W.shape[0]), br)
    log.info("locality ordering: %.1f%% of edge weight inside blocks of %d rows (input order: %.1f%%)",
             100 * share, br, 100 * base)
    return {"method": "reverse_cuthill_mckee", "block_rows": br, "weight_inside_blocks": share,
            "weight_inside_blocks_input_order": base}
