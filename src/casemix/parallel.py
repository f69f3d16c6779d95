"""Independent replicates (bootstrap refits, leave-one-out refits) run on joblib.

One engine for all replicate work: joblib's process backend on this machine by default, or a
Dask cluster through joblib's Dask backend when a scheduler address is given (the argument,
or the ``CASEMIX_SCHEDULER`` environment variable; ``pip install casemix[cluster]`` brings
dask and distributed). Nothing here schedules work itself.

Each local worker process runs with one BLAS / OpenMP thread: replicates are the parallel
unit, and worker processes that each start as many BLAS threads as there are cores
oversubscribe the machine (badly so when another process is busy). Workers of a Dask
cluster take their thread limits from the cluster (distributed's nanny starts workers with
one BLAS thread by default).

The results do not depend on the backend or on the number of workers as long as every item
carries its own seed (the callers pass one ``numpy.random.SeedSequence`` child per
replicate) and ``func`` is deterministic.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Iterator

__all__ = ["DEFAULT_WORKERS", "SCHEDULER_ENV", "replicate_map"]

DEFAULT_WORKERS = 2
SCHEDULER_ENV = "CASEMIX_SCHEDULER"


def replicate_map(
    func: Callable,
    items: Iterable,
    *,
    workers: int = DEFAULT_WORKERS,
    scheduler: str | None = None,
) -> Iterator:
    """Apply ``func`` to every item, yielding the results in the order of ``items``.

    Parameters
    ----------
    func : callable
        Picklable (a module-level function or an instance of a module-level class); large
        numpy arrays among its attributes are shared with local workers through memory
        maps, or sent once to every Dask worker, rather than copied per item.
    items : iterable
    workers : int, default 2
        Local worker processes (1: one worker process, still with one BLAS thread).
        Ignored on a Dask cluster, which uses all its workers.
    scheduler : str, optional
        Address of a Dask scheduler (for example ``tcp://10.0.0.5:8786``); default the
        ``CASEMIX_SCHEDULER`` environment variable, else local processes.

    Yields
    ------
    object
        ``func(item)`` for each item, in order, as they become available.

    Raises
    ------
    InputError
        ``workers`` below 1.
    CasemixError
        A scheduler is named but distributed is not installed.
    """
    import joblib  # imported here: commands without replicate work do not pay for it

    from casemix.errors import InputError

    if workers < 1:
        raise InputError(f"workers must be at least 1, got {workers}")
    items = list(items)
    scheduler = scheduler or os.environ.get(SCHEDULER_ENV) or None
    if scheduler is None:
        with joblib.parallel_config(backend="loky", inner_max_num_threads=1):
            yield from joblib.Parallel(n_jobs=workers, return_as="generator")(
                joblib.delayed(func)(item) for item in items
            )
        return
    from casemix._optional import require

    distributed = require("distributed", f"running replicates on the Dask scheduler {scheduler}")
    # func travels as an argument, scattered once to every worker (the backend would hash it
    # as a callable, and our tasks are dataclasses holding arrays, which do not hash)
    with distributed.Client(scheduler), joblib.parallel_config(backend="dask", scatter=[func]):
        yield from joblib.Parallel(n_jobs=-1, return_as="generator")(
            joblib.delayed(_apply)(func, item) for item in items
        )


def _apply(func: Callable, item):
    return func(item)
