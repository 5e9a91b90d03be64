"""Read slots: where each node's scaled score sits in the vector the rank kernel reads.

A PageRank step reads ``s[i] = r[i] / out_weight[i]`` once per out-link of ``i``, in the order
the shards list the sources: random reads, the cost of a step. Since format version 2 a store
lays that vector out by descending out-degree (ties by id), so the most-read scores share a few
cache lines: on a Graph500 Kronecker graph the 2^18 most-linking nodes (2 MiB of scores) account
for three quarters of all reads. Node ids, ``nodes.parquet``, the degree files and every score a
user sees stay in id (key) order; only the shards' source column and the scaled-score vector
use slots::

    read_slot.npy       uint[N]   read_slot[id] = slot of node id (a permutation of 0..N-1)
    shards/*.sources    uint[e_b] the slots of each row's sources, ascending within the row

Version-1 stores have no ``read_slot.npy``: their sources are ids (slot = id).
"""

from __future__ import annotations

import numpy as np


def slot_order(out_degree: np.ndarray, dtype: np.dtype | str) -> np.ndarray:
    """The read slot of every node: rank by descending out-degree, ties by ascending id."""
    n = out_degree.shape[0]
    by_slot = np.argsort(-np.asarray(out_degree, dtype=np.int64), kind="stable")
    slot = np.empty(n, dtype=np.dtype(dtype))
    slot[by_slot] = np.arange(n, dtype=slot.dtype)
    return slot


def ids_by_slot(slot: np.ndarray) -> np.ndarray:
    """The inverse permutation: the node id held in each slot (int64)."""
    ids = np.empty(slot.shape[0], dtype=np.int64)
    ids[np.asarray(slot, dtype=np.int64)] = np.arange(slot.shape[0], dtype=np.int64)
    return ids
