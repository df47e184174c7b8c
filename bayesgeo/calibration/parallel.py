"""Independent work units, run locally or on a dask.distributed cluster, with seeds that travel.

A *work unit* is one independent piece of a larger job: the fit of one site or one covariance
family, one calibration replicate, one chunk of prediction targets. :func:`make_units` pairs each
payload with its own seed, derived from the user's seed with
``numpy.random.SeedSequence(seed).spawn(n)`` (independent streams; O'Neill 2014, the PCG paper, and
the NumPy documentation of ``SeedSequence``), so a unit's numbers depend only on the user's seed
and the unit's position, never on where or in which order it ran. :func:`run_units` runs
``func(unit)`` for every unit and returns the results in input order:

* ``scheduler=None``, ``workers=1`` (default): one after the other in this process;
* ``scheduler=None``, ``workers=k > 1``: a local pool of k processes (fresh "spawn" processes:
  ``func`` must be importable, i.e. defined at module level);
* ``scheduler="tcp://host:port"``: a running dask.distributed scheduler, through
  ``distributed.Client(address)``; workers need bayesgeo installed in the same version. How to
  start one is in ``docs/large_data.md``.
"""

from __future__ import annotations

import concurrent.futures as cf
import multiprocessing
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from bayesgeo.common.validate import InputError, check_positive_int

__all__ = ["WorkUnit", "make_units", "run_units"]

@dataclass(frozen=True)
class WorkUnit:
    """One independent piece of work.

    Attributes
    ----------
    index : int
        Position in the job (results come back in this order).
    payload : Any
        What the work function needs (picklable for processes and clusters).
    seed : int
        This unit's own seed (0 <= seed < 2**63), from ``SeedSequence(user_seed).spawn(n)[index]``.
    """

    index: int
    payload: Any
    seed: int

    def rng(self) -> np.random.Generator:
        """A NumPy generator seeded with this unit's seed."""
        return np.random.default_rng(self.seed)


def make_units(payloads: Iterable, seed: int) -> list[WorkUnit]:
    """Pair every payload with its own seed spawned from ``seed``.

    Parameters
    ----------
    payloads : iterable
        One payload per unit.
    seed : int
        The user's seed (>= 0).

    Returns
    -------
    list of WorkUnit
        ``units[i].seed`` is the first 64-bit word of ``SeedSequence(seed).spawn(n)[i]``, masked
        to 63 bits (a non-negative int accepted by NumPy and PyMC).
    """
    seed = check_positive_int(seed, "seed", minimum=0)
    payloads = list(payloads)
    children = np.random.SeedSequence(seed).spawn(len(payloads))
    return [WorkUnit(i, p, int(c.generate_state(1, dtype=np.uint64)[0]) & (2**63 - 1))
            for i, (p, c) in enumerate(zip(payloads, children))]


def _connect(scheduler: str, timeout: float):
    from distributed import Client

    if not isinstance(scheduler, str) or "://" not in scheduler:
        raise InputError(f"scheduler: expected an address such as tcp://host:8786, got {scheduler!r}")
    try:
        return Client(scheduler, timeout=f"{float(timeout)}s")
    except (OSError, TimeoutError) as err:
        raise InputError(f"scheduler: cannot reach a dask scheduler at {scheduler!r} "
                         f"({type(err).__name__}: {str(err).splitlines()[0] if str(err) else 'no answer'})") from None


def run_units(func: Callable[[WorkUnit], Any], units: Sequence[WorkUnit], *, scheduler: str | None = None,
              workers: int = 1, progress=None, timeout: float = 10.0) -> list:
    """Run ``func(unit)`` for every unit; results in input order.

    Parameters
    ----------
    func : callable
        Takes one :class:`WorkUnit` and returns its result; must be a module-level function for
        ``workers > 1`` or a cluster (it is pickled).
    units : sequence of WorkUnit
        From :func:`make_units`.
    scheduler : str, optional
        Address of a dask.distributed scheduler (``"tcp://host:port"``); local when omitted.
    workers : int
        Local processes (``scheduler`` omitted): 1 runs the units here, one after the other.
    progress : object with ``update(int)``, optional
        Told as each unit finishes (a tqdm bar on stderr, say).
    timeout : float
        Seconds to wait for the scheduler to answer before giving up.

    Returns
    -------
    list
        ``[func(u) for u in units]``, whatever the order in which units finished.

    Raises
    ------
    InputError
        Unreachable or malformed scheduler address (message names ``--scheduler`` and the address).
    """
    units = list(units)
    if any(not isinstance(u, WorkUnit) for u in units):
        raise TypeError("units must be WorkUnit objects (see make_units)")
    workers = check_positive_int(workers, "workers")
    tick = progress.update if progress is not None else (lambda k: None)
    if scheduler is not None:
        return _run_cluster(func, units, scheduler, tick, timeout)
    if workers == 1 or len(units) <= 1:
        out = []
        for u in units:
            out.append(func(u))
            tick(1)
        return out
    results: list = [None] * len(units)
    ctx = multiprocessing.get_context("spawn")
    with cf.ProcessPoolExecutor(max_workers=min(workers, len(units)), mp_context=ctx) as pool:
        futures = {pool.submit(func, u): k for k, u in enumerate(units)}
        for fut in cf.as_completed(futures):
            results[futures[fut]] = fut.result()
            tick(1)
    return results


def _run_cluster(func, units, scheduler, tick, timeout):
    from distributed import as_completed

    client = _connect(scheduler, timeout)
    try:
        futures = client.map(func, units, pure=False)
        position = {f.key: k for k, f in enumerate(futures)}
        results: list = [None] * len(units)
        for fut in as_completed(futures):
            results[position[fut.key]] = fut.result()
            tick(1)
        return results
    finally:
        client.close()
