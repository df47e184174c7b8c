"""Work units run locally, in a process pool or on a dask.distributed cluster give the same results.

References: NumPy's SeedSequence.spawn (numpy.random documentation) for the seeds; the local,
sequential run of the same units for everything else.
"""

from __future__ import annotations

import sys

import numpy as np
import pytest

from bayesgeo.calibration.parallel import WorkUnit, make_units, run_units
from bayesgeo.common.validate import InputError


def _work(unit: WorkUnit):
    """A small stochastic job: simulate 200 draws from the unit's generator and summarise them."""
    rng = unit.rng()
    x = rng.normal(loc=unit.payload, size=200)
    return unit.index, float(x.mean()), float(x.std())


class _Count:
    def __init__(self):
        self.n = 0

    def update(self, k):
        self.n += k


def test_seeds_come_from_seedsequence_spawn():
    """Unit seeds are the first 64-bit word (masked to 63 bits) of SeedSequence(seed).spawn(n)[i]
    (NumPy documentation of SeedSequence), distinct, and the same for the same seed."""
    units = make_units(["a", "b", "c", "d"], seed=42)
    children = np.random.SeedSequence(42).spawn(4)
    assert [u.seed for u in units] == [int(c.generate_state(1, dtype=np.uint64)[0]) & (2**63 - 1) for c in children]
    assert len({u.seed for u in units}) == 4
    assert [u.payload for u in units] == ["a", "b", "c", "d"]
    assert [u.seed for u in make_units(range(4), seed=42)] == [u.seed for u in units]
    assert [u.seed for u in make_units(range(4), seed=43)] != [u.seed for u in units]


def test_sequential_results_in_order_with_progress():
    """Sequential local run: results in input order, one progress tick per unit."""
    units = make_units([0.0, 1.0, 2.0], seed=1)
    count = _Count()
    res = run_units(_work, units, progress=count)
    assert [r[0] for r in res] == [0, 1, 2]
    assert count.n == 3
    assert res[2][1] == pytest.approx(2.0, abs=0.3)  # mean of 200 N(2, 1) draws


@pytest.mark.slow
def test_process_pool_equals_sequential():
    """Two local processes give the same numbers as the sequential run (seeds travel with units).
    Slow: each spawned process imports bayesgeo afresh (about 25 s here under load)."""
    units = make_units([0.0, 1.0, 2.0, 3.0], seed=7)
    assert run_units(_work, units, workers=2) == run_units(_work, units)


@pytest.mark.parametrize("processes", [False, pytest.param(True, marks=pytest.mark.slow)])
def test_local_cluster_equals_local_run(processes):
    """A dask.distributed LocalCluster on loopback (1 or 2 workers, one thread each) returns exactly
    the local results for the same seeds, in input order."""
    from distributed import LocalCluster

    if processes:  # workers in other processes cannot import this test module by name
        import cloudpickle

        cloudpickle.register_pickle_by_value(sys.modules[__name__])
    units = make_units([0.5 * k for k in range(6)], seed=2026)
    expected = run_units(_work, units)
    # in-process workers talk over inproc://; worker processes over tcp on loopback only
    where = {"host": "127.0.0.1"} if processes else {}
    with LocalCluster(n_workers=2 if processes else 1, threads_per_worker=1, processes=processes,
                      dashboard_address=None, **where) as cluster:
        count = _Count()
        got = run_units(_work, units, scheduler=cluster.scheduler_address, progress=count)
    assert got == expected
    assert count.n == 6


def test_unreachable_scheduler_is_an_input_error():
    """No scheduler listens on port 1 of loopback: InputError naming --scheduler and the address;
    a malformed address is refused before connecting."""
    units = make_units([0.0], seed=1)
    with pytest.raises(InputError, match=r"^scheduler: cannot reach .*tcp://127\.0\.0\.1:1"):
        run_units(_work, units, scheduler="tcp://127.0.0.1:1", timeout=2.0)
    with pytest.raises(InputError, match="^scheduler: expected an address"):
        run_units(_work, units, scheduler="127.0.0.1")


def test_bad_units_and_workers():
    """Plain payloads instead of WorkUnit objects: TypeError; workers < 1: InputError naming --workers."""
    with pytest.raises(TypeError, match="WorkUnit"):
        run_units(_work, [0.0])
    with pytest.raises(InputError, match="^workers"):
        run_units(_work, make_units([0.0], seed=1), workers=0)
