"""Every default of shardrank, once, with its unit.

Other modules import these names; nothing else in the package hard-codes a default.
"""

from __future__ import annotations

# --- store format -------------------------------------------------------------------------------
STORE_FORMAT = "shardrank-store"  # manifest "format" field
STORE_FORMAT_VERSION = 2  # bump on any incompatible change; readers refuse newer versions
RUN_FORMAT = "shardrank-run"
RUN_FORMAT_VERSION = 1

# Destination ids per shard (block). 2**18 nodes keeps a block's score slice (2 MiB of float64)
# in L2/L3 while giving enough blocks for Gauss-Seidel to pay off; see docs/store-format.md.
BLOCK_NODES = 1 << 18  # nodes

# --- build ----------------------------------------------------------------------------------
MEMORY_FRACTION = 0.5  # share of physical RAM the build may use when --memory is not given
BATCH_ROWS = 1 << 20  # rows per Arrow batch streamed out of DuckDB (bounded Python memory)
ID_WIDTHS = (16, 32, 64)  # bits of a stored source id; "auto" picks the narrowest that fits

# --- rank -----------------------------------------------------------------------------------
DAMPING = 0.85  # probability of following an out-link
TOL = 1e-9  # guaranteed L1 distance to the exact PageRank vector
MAX_ITER = 1000  # iterations (sweeps) before giving up with exit 3
METHOD = "gauss-seidel"  # "power" or "gauss-seidel"; see docs/performance.md
DEAD_ENDS = "teleport"  # "teleport" (strongly preferential) or "uniform" (weakly preferential)
CHECKPOINT_SECONDS = 60.0  # seconds between checkpoints when --checkpoint-every is not given
CHECKPOINTS_KEPT = 2  # newest checkpoints kept in RUN/checkpoints
MAX_OPEN_SHARD_FILES = 512  # shard mappings kept open across iterations (one descriptor each)
# ...and only while the shards total at most this many bytes: a kept mapping stays in the
# process's resident memory once read, so larger stores are mapped one block at a time
# (rank memory flat in the edge count; see docs/performance.md)
MAX_KEPT_SHARD_BYTES = 64 * 2**20  # bytes
ROW_CHUNK = 4096  # destination rows per parallel work item inside a block (fixed: determinism)
MASS_TOLERANCE = 1e-12  # |sum(scores) - 1| allowed after every iteration

# --- output ---------------------------------------------------------------------------------
TOP_K = 25  # rows shown by `shardrank top`
COMPARE_K = 1000  # top-k used by `shardrank compare`
PROGRESS_INTERVAL = 0.5  # seconds between progress redraws on a terminal
PROGRESS_LOG_INTERVAL = 10.0  # seconds between progress lines when not on a terminal

# --- refresh --------------------------------------------------------------------------------
REFRESH_KEEP = 7  # generations (stores and runs) a refresh home keeps; the published run always stays
