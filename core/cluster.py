"""Maps on a Dask distributed scheduler: the same chunks and rows as the local workers.

The cut into chunks depends on the scenario alone (core.maps.plan), so a chunk trained on a
worker of another machine gives the rows it gives here, as long as that machine runs the same
Gradfence and torch; the workers are checked for both before any chunk is sent.
"""

from __future__ import annotations

import asyncio
import importlib.metadata
import importlib.util
import traceback
import uuid
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from typing import TYPE_CHECKING, Any

import core
from core.errors import GradfenceInputError
from core.maps import Chunk, run_chunk

if TYPE_CHECKING:
    from distributed import Client, Future

EXTRA_MISSING = "--cluster needs the cluster extra: pip install 'gradfence[cluster]'."


def execute_on_cluster(
    address: str, scenario_text: str, chunks: list[Chunk], timeout: float = 10.0
) -> Iterator[list[dict[str, Any]]]:
    """Yield each chunk's rows as it finishes on the Dask scheduler at `address`.

    Chunks are handed to the scheduler in the given order (the costliest first, as run_map
    sorts them). `timeout` bounds the wait for the scheduler to answer and for a first worker.
    Stopping the iteration (Ctrl-C included) cancels the chunks not yet finished.
    """
    if not chunks:
        return
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise GradfenceInputError(EXTRA_MISSING) from None
    _shake_hands(address, timeout)
    try:
        client = Client(address, timeout=timeout, set_as_default=False)
    except (OSError, ValueError) as exc:
        raise GradfenceInputError(
            f"the Dask scheduler at {address} did not let us in ({_last_line(exc)}); "
            "check that the address is a scheduler's, e.g. tcp://host:8786."
        ) from None
    pending: dict[Future[list[dict[str, Any]]], Chunk] = {}
    try:
        _check_workers(client, address, timeout)
        for position, chunk in enumerate(chunks):
            future = client.submit(
                _run_chunk_on_worker,
                scenario_text,
                chunk,
                key=f"gradfence-stack-{uuid.uuid4().hex}",
                priority=len(chunks) - position,  # higher runs sooner: keep the given order
            )
            pending[future] = chunk
        for future in as_completed(list(pending), loop=client.loop):
            chunk = pending.pop(future)
            try:
                rows = future.result()
            except Exception as exc:  # the worker's error, raised again here
                who = "a Dask worker failed"
                if future.cancelled():  # not failed: the scheduler went away under it
                    who = f"the Dask scheduler at {address} lost"
                raise GradfenceInputError(
                    f"{who} the stack of batch size {chunk.batch_size} ({_last_line(exc)}); "
                    "the finished stacks are kept: continue with --resume once that is fixed."
                ) from None
            yield rows
    finally:
        if pending:
            client.cancel(list(pending))
        client.close()


def _run_chunk_on_worker(scenario_text: str, chunk: Chunk) -> list[dict[str, Any]]:
    """run_chunk on a Dask worker, with one torch thread like every local worker."""
    import torch

    # A worker runs one task per thread it offers (--nthreads); each task gets one core.
    torch.set_num_threads(1)
    return run_chunk(scenario_text, chunk)


def _shake_hands(address: str, timeout: float) -> None:
    """Connect to the scheduler once with dask.distributed's own protocol, in bounded time.

    A Client waits forever for the handshake of a server that is no scheduler (the dashboard's
    port, say), and one that fails to connect leaves its event-loop thread running; this probe
    runs on an event loop and a thread of its own, both gone when it returns.
    """
    from distributed.comm.core import connect
    from distributed.security import Security

    async def shake_hands() -> None:
        arguments = Security().get_connection_args("client")
        # dask retries a refused connection until `timeout`; the handshake after it has no bound.
        comm = await asyncio.wait_for(connect(address, timeout, **arguments), 2 * timeout)
        await comm.close()

    # A thread of its own also works where an event loop already runs (a Jupyter notebook).
    with ThreadPoolExecutor(1, thread_name_prefix="gradfence-dask-probe") as pool:
        try:
            pool.submit(asyncio.run, shake_hands()).result()
        except TimeoutError:
            raise GradfenceInputError(
                f"something at {address} accepts connections but does not answer as a Dask "
                "scheduler; check the port: a scheduler listens on 8786 unless told otherwise, "
                "its dashboard on 8787."
            ) from None
        except ValueError as exc:
            raise GradfenceInputError(
                f"--cluster {address}: {exc}; give it as tcp://host:port, e.g. tcp://host:8786."
            ) from None
        except OSError:
            raise GradfenceInputError(
                f"nothing answers at {address} within {timeout:g} s; check that "
                "`dask scheduler` runs on that machine, that the host and port (8786 "
                "unless the scheduler was told otherwise) are right and that no firewall "
                "blocks the port."
            ) from None


def _check_workers(client: Client, address: str, timeout: float) -> None:
    """Refuse a cluster without workers, or with one that would give other numbers."""
    try:
        client.wait_for_workers(1, timeout=timeout)
    except TimeoutError:
        raise GradfenceInputError(
            f"the Dask scheduler at {address} has no workers after {timeout:g} s; start some "
            f"with `dask worker {address} --nthreads 1`."
        ) from None
    # Standard-library functions only: a worker without this module cannot unpickle a function
    # of ours, and dask.distributed then drops the worker instead of reporting an error.
    ours = (core.__version__, importlib.metadata.version("torch"))
    install = (
        f"install Gradfence {ours[0]} with torch {ours[1]} on every worker machine, as on this one"
    )
    # The scheduler unpickles every task as well, so it needs this module as much as a worker.
    try:
        spec = client.run_on_scheduler(importlib.util.find_spec, __name__)
        why = f"no module {__name__}" if spec is None else ""
    except Exception as exc:  # the scheduler's error, raised again here
        why = _last_line(exc)
    if why:
        raise GradfenceInputError(
            f"the Dask scheduler at {address} cannot read Gradfence stacks ({why}); "
            f"install Gradfence {ours[0]} on its machine too."
        )
    specs = client.run(importlib.util.find_spec, __name__, on_error="return")
    gradfence = client.run(importlib.metadata.version, "gradfence", on_error="return")
    torch = client.run(importlib.metadata.version, "torch", on_error="return")
    for worker in sorted(specs):
        spec = specs[worker]
        if spec is None or isinstance(spec, BaseException):
            why = f"no module {__name__}" if spec is None else _last_line(spec)
            raise GradfenceInputError(
                f"the Dask worker at {worker} cannot train Gradfence stacks ({why}); {install}."
            )
        if worker not in gradfence or worker not in torch:
            continue  # it left the cluster meanwhile: it gets no stacks
        theirs = (gradfence[worker], torch[worker])
        for found in theirs:
            if isinstance(found, BaseException):
                raise GradfenceInputError(
                    f"the Dask worker at {worker} lacks a package ({_last_line(found)}); {install}."
                )
        if theirs != ours:
            raise GradfenceInputError(
                f"the Dask worker at {worker} has Gradfence {theirs[0]} with torch {theirs[1]} "
                f"and this machine Gradfence {ours[0]} with torch {ours[1]}; install the same "
                "versions everywhere, or a stack's numbers would depend on where it ran."
            )


def _last_line(exc: BaseException) -> str:
    """The exception as its traceback's last line says it, on one line."""
    return " ".join("".join(traceback.format_exception_only(exc)).split())
