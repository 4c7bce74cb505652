"""The streaming pass on dask.distributed: one task per partition, merged by a tree reduction.

Each worker reads its partition itself (a row range of a ``.npy`` file or a
Parquet row group; the labels travel with the task), computes the float64
moments of its fitting rows and its hash-drawn samples, and pairs of results
are merged on the workers level by level (Chan et al.'s update), so the
driver receives one result and the merge tree is only log2(partitions) deep.
Merging in another order changes the moments only at rounding level: the
distributed eraser equals the single-process one to 1e-9.
"""

from __future__ import annotations

from collections.abc import Sequence

from veil.fitting.plan import PartResult, PassPlan
from veil.samples.chunks import Partition


def _merge(earlier: PartResult, later: PartResult) -> PartResult:
    return earlier.merge(later)


def run_pass(plan: PassPlan, partitions: Sequence[Partition], *, scheduler: str | None, workers: int) -> PartResult:
    """Run ``plan`` over ``partitions`` on a Dask cluster (the one at ``scheduler``, or a new local one)."""
    from distributed import Client, LocalCluster

    # distributed ships no type hints; its calls are untyped to mypy.
    cluster = None if scheduler else LocalCluster(n_workers=workers, threads_per_worker=1, processes=True)  # type: ignore[no-untyped-call]
    try:
        with Client(scheduler or cluster) as client:  # type: ignore[no-untyped-call]
            level = client.map(plan.process_partition, list(partitions), pure=False)
            while len(level) > 1:
                # Neighbours only, in order: the samples stay in row order up the tree.
                merged = [
                    client.submit(_merge, a, b, pure=False) for a, b in zip(level[::2], level[1::2], strict=False)
                ]
                level = merged + ([level[-1]] if len(level) % 2 else [])
            result: PartResult = level[0].result()
            return result
    finally:
        if cluster is not None:
            cluster.close()
