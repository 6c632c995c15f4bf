"""Map a per-run job over many runs: serially or in local processes.

Results come back in input order whichever executor ran them, so reports
are deterministic. Work is sent in chunks of neighbouring runs, so that each
worker's sidecar cache (one per chunk) serves runs that inherit the same
files.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from typing import TypeVar

T = TypeVar("T")
R = TypeVar("R")

Progress = Callable[[int, int], None]  # (done, total)


def available_cpus() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def chunked(items: Sequence[T], size: int) -> list[Sequence[T]]:
    return [items[i:i + size] for i in range(0, len(items), size)]


def map_chunks(
    job: Callable[[Sequence[T]], list[R]],
    items: Sequence[T],
    *,
    jobs: int = 1,
    chunk_size: int = 64,
    progress: Progress | None = None,
) -> list[R]:
    """Apply ``job`` to chunks of ``items``; return the concatenated results in order.

    ``job`` must be a picklable top-level function when ``jobs > 1``. With one
    job, or few items, everything runs in this process.
    """
    chunks = chunked(items, chunk_size)
    total = len(items)
    done = 0
    if jobs <= 1 or len(chunks) <= 1:
        results: list[R] = []
        for chunk in chunks:
            results.extend(job(chunk))
            done += len(chunk)
            if progress:
                progress(done, total)
        return results
    ordered: list[list[R] | None] = [None] * len(chunks)
    with ProcessPoolExecutor(max_workers=min(jobs, len(chunks))) as pool:
        futures = {pool.submit(job, chunk): i for i, chunk in enumerate(chunks)}
        try:
            for future in as_completed(futures):
                i = futures[future]
                ordered[i] = future.result()
                done += len(chunks[i])
                if progress:
                    progress(done, total)
        except BaseException:
            for future in futures:
                future.cancel()
            raise
    return [r for part in ordered if part is not None for r in part]
