"""Run the batch's maps on a dask.distributed cluster (the optional extra ``cluster``).

The same pipeline object is shipped to the workers once (``scatter`` with
``broadcast=True``); each task loads its own file and returns the small
result dict of :func:`~stabtool.batch.worker.analyze_one`, including the plot
bytes, so only the submitting process writes the output folder. The workers
must be able to read the input paths (a shared file system).
"""

from __future__ import annotations

from typing import Any, Iterator, Sequence

from ..errors import InputError
from .worker import analyze_one, one_line_reason

__all__ = ["connect", "run_on_dask"]


def connect(scheduler: str | Any, *, timeout: str = "10s") -> tuple[Any, bool]:
    """Return ``(client, owned)`` for a scheduler address or an existing client.

    Raises
    ------
    InputError
        When dask.distributed is not installed or the scheduler cannot be reached.
    """
    try:
        from distributed import Client
    except ImportError:
        raise InputError(
            "--scheduler",
            "needs dask.distributed; install the extra: pip install 'stabtool[cluster]'",
        ) from None
    if isinstance(scheduler, Client):
        return scheduler, False
    try:
        return Client(scheduler, timeout=timeout, set_as_default=False), True
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError("--scheduler", f"cannot reach {scheduler!r}: {one_line_reason(exc)}") from None


def run_on_dask(
    scheduler: str | Any,
    analyzer: Any,
    items: Sequence[Any],
    *,
    plot: bool = True,
    window: int | None = None,
) -> Iterator[tuple[Any, dict]]:
    """Yield ``(item, result dict)`` as the cluster finishes them.

    Parameters
    ----------
    scheduler : str or distributed.Client
        Scheduler address (``tcp://host:8786``) or a connected client.
    analyzer : picklable pipeline
        Sent to every worker once.
    items : sequence of BatchItem
        Maps to analyse (``.path`` is read by the worker).
    plot : bool
        Render the plots.
    window : int, optional
        Tasks in flight at once (default: twice the cluster's threads, at
        least 4), so the scheduler never holds the whole night.
    """
    if not items:
        return
    from distributed import as_completed

    client, owned = connect(scheduler)
    try:
        if window is None:
            threads = sum(client.nthreads().values()) or 1
            window = max(4, 2 * threads)
        remote_analyzer = client.scatter(analyzer, broadcast=True, hash=False)
        queue = list(reversed(items))
        futures: dict[Any, Any] = {}

        def submit(ac: Any | None) -> None:
            item = queue.pop()
            fut = client.submit(analyze_one, remote_analyzer, item.path, plot=plot, pure=False,
                                key=f"stabtool-{item.hash}-{id(item)}")
            futures[fut] = item
            if ac is not None:
                ac.add(fut)

        with client.as_current():  # as_completed looks the client up
            for _ in range(min(window, len(queue))):
                submit(None)
            ac = as_completed(list(futures))
            for fut in ac:
                item = futures.pop(fut)
                try:
                    res = fut.result()
                except Exception as exc:  # noqa: BLE001 - a lost worker fails this map only
                    res = {"status": "failed",
                           "reason": f"cluster task failed: {one_line_reason(exc)}",
                           "result": None, "time": None, "elapsed_s": float("nan"), "png": None,
                           "info": None}
                fut.release()
                if queue:
                    submit(ac)
                yield item, res
    finally:
        if owned:
            client.close()
