"""Running a fleet on a dask.distributed cluster (optional extra ``loopvet[cluster]``)."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any


class ClusterUnavailable(RuntimeError):
    pass


def run_on_cluster(address: str, work: list[tuple[str, bytes]], fn: Callable[[Any], Any],
                   progress: Callable[[int, int], None] | None = None) -> list[Any]:
    """Map ``fn`` over ``work`` on the scheduler at ``address``; results in input order."""
    try:
        from dask.distributed import Client, as_completed
    except ImportError:
        raise ClusterUnavailable("--cluster needs dask.distributed: pip install "
                                 "'loopvet[cluster]'") from None
    try:
        client = Client(address, timeout=10)
    except OSError as exc:
        raise ClusterUnavailable(f"cannot reach the cluster scheduler at {address}: "
                                 f"{exc}") from None
    try:
        futures = client.map(fn, work, pure=False)
        if progress:
            for i, _ in enumerate(as_completed(futures)):
                progress(i + 1, len(work))
        return list(client.gather(futures))
    finally:
        client.close()
