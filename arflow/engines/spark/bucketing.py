"""How series fall into buckets, one bucket per Spark task."""

from __future__ import annotations

from typing import Any

import numpy as np

from .session import default_parallelism

#: Default series per Spark task (bucket). Measured with bench/spark_overhead.py on 2 cores at
#: 100,000 series: buckets of 3,000 to 12,500 series took about the same time, two buckets of
#: 50,000 about 1.7x as long (a huge group is sorted, spilled and concatenated as one table).
SERIES_PER_TASK = 10_000


def murmur3_long(values: np.ndarray, seed: int = 42) -> np.ndarray:
    """Spark's ``hash()`` of BIGINT values (Murmur3 x86 32-bit, seed 42), vectorised."""
    m = np.uint64(0xFFFFFFFF)
    v = values.astype(np.int64).view(np.uint64)

    def rotl(x: np.ndarray, r: int) -> np.ndarray:
        return ((x << np.uint64(r)) | (x >> np.uint64(32 - r))) & m

    def mix_k1(k: np.ndarray) -> np.ndarray:
        k = (k * np.uint64(0xCC9E2D51)) & m
        k = rotl(k, 15)
        return (k * np.uint64(0x1B873593)) & m

    def mix_h1(h: np.ndarray, k: np.ndarray) -> np.ndarray:
        h = h ^ k
        h = rotl(h, 13)
        return (h * np.uint64(5) + np.uint64(0xE6546B64)) & m

    h = np.full(v.shape, np.uint64(seed))
    h = mix_h1(h, mix_k1(v & m))
    h = mix_h1(h, mix_k1((v >> np.uint64(32)) & m))
    h = h ^ np.uint64(8)
    h = h ^ (h >> np.uint64(16))
    h = (h * np.uint64(0x85EBCA6B)) & m
    h = h ^ (h >> np.uint64(13))
    h = (h * np.uint64(0xC2B2AE35)) & m
    h = h ^ (h >> np.uint64(16))
    return h.astype(np.uint32).view(np.int32).astype(np.int64)


def bucket_labels(n: int) -> list[int]:
    """``n`` BIGINT labels; label ``i`` lands in partition ``i`` of ``repartition(n, label)``.

    Spark's hash partitioner puts a row in ``pmod(hash(label), n)``. Choosing
    labels that hash to 0..n-1 gives each of the ``n`` tasks exactly one bucket.
    """
    labels = np.full(n, -1, dtype=np.int64)
    start, width = 0, 8 * n + 64
    while (labels < 0).any():
        cand = np.arange(start, start + width, dtype=np.int64)
        part = np.mod(murmur3_long(cand), n)
        _, first = np.unique(part, return_index=True)
        for p, idx in zip(np.unique(part), first):
            if labels[p] < 0:
                labels[p] = cand[idx]
        start += width
    return labels.tolist()


def bucket_count(spark: Any, series: int, chunk_series: int, partitions: int | None) -> int:
    """``[spark] partitions``, else one bucket per ``min(chunk_series, SERIES_PER_TASK)`` series, at least the parallelism."""
    if partitions is not None:
        return partitions
    per = min(chunk_series, SERIES_PER_TASK)
    return max(1, min(max(series, 1), max(-(-series // per), default_parallelism(spark))))


def bucketed(data: Any, keys: tuple[str, ...], labels: tuple[int, ...], column: str) -> Any:
    """``data`` with a bucket label column, repartitioned so that each task holds exactly one bucket."""
    from pyspark.sql import functions as F

    n = len(labels)
    index = F.pmod(F.xxhash64(*[F.col(k) for k in keys]), F.lit(n)).cast("int")
    label = F.element_at(F.array(*[F.lit(v).cast("long") for v in labels]), index + 1)
    return data.withColumn(column, label).repartition(n, column)
