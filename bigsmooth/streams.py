"""Named random streams: every random choice of the job draws from a stream named for what it does,
derived from the one seed in the config (run.seed). The name -> offset table keeps each stream's
numbers what they were when the streams were seed + 1, seed + 2, ... in five files, so naming them
changed no result; a new stream takes the next free offset.
"""

import numpy as np

OFFSETS = {
    "embed.probe_sample": 0,  # rows sampled for the leakage probe
    "embed.linear_probe": 1,  # the probe's hold-out split
    "graph.index": 0,  # pynndescent's random projection trees (a legacy RandomState)
    "order.kmeans": 2,  # sample and k-means++ start of the block groups
    "audit.pairs": 3,  # random pairs (global Lipschitz rate) and the automatic constant
    "audit.random_graph": 4,  # the random-graph control
    "tune.holdout": 5,  # labelled rows held out of the choice of lam
    "audit.counterfactual": 6,  # rows sampled for the exact counterfactual figure
    "audit.vote_sample": 7,  # rows sampled for the neighbour-vote leakage probe
    "graph.partition": 8,  # sample and k-means++ starts of the partitioned build
    "graph.recall": 9,  # rows sampled for the graph's recall check
}


def seed_of(seed, name):
    """The integer seed of stream ``name`` (for libraries that take a seed, not a Generator)."""
    try:
        return int(seed) + OFFSETS[name]
    except KeyError:
        raise KeyError(f"unknown random stream {name!r}; declare it in bigsmooth/streams.py") from None


def rng(seed, name):
    """A numpy Generator for stream ``name``."""
    return np.random.default_rng(seed_of(seed, name))
