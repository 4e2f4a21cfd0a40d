"""Parallel task mapping with Dask (twinray.parallel).

Task functions come from importable modules (numpy, twinray) because the
worker processes cannot import the test files.
"""

import numpy as np
import pytest

from twinray.errors import TwinrayInputError
from twinray.parallel import dask_client, map_tasks
from twinray.schedule import FrameSchedule, parse_schedule


@pytest.fixture(scope="module")
def two_workers():
    with dask_client(workers=2) as client:
        yield client


def _items():
    rng = np.random.default_rng(3)
    return [rng.normal(size=(50, 7)) * (k + 1) for k in range(5)]


def test_results_in_item_order_and_identical_in_process_and_on_workers(two_workers):
    """(One worker against two is checked on real reconstructions in test_dynamic.py.)"""
    items = _items()
    inline = map_tasks(np.cumsum, items, {"axis": 0}, workers=0)
    with_two = map_tasks(np.cumsum, items, {"axis": 0}, client=two_workers)
    single = map_tasks(np.cumsum, items[:1], {"axis": 0})   # one task, no cluster started
    for a, b, item in zip(inline, with_two, items):
        np.testing.assert_array_equal(a, np.cumsum(item, axis=0))
        assert a.tobytes() == b.tobytes()
    assert single[0].tobytes() == inline[0].tobytes()


def test_cluster_listens_on_loopback_only(two_workers):
    info = two_workers.scheduler_info()
    assert two_workers.scheduler.address.startswith("tcp://127.0.0.1:")
    assert len(info["workers"]) == 2
    assert all(addr.startswith("tcp://127.0.0.1:") for addr in info["workers"])


def test_library_errors_come_back_as_input_errors(two_workers):
    done = []
    out = map_tasks(parse_schedule, ["2x10", "3x5"], client=two_workers, on_done=lambda: done.append(1))
    assert isinstance(out[0], FrameSchedule) and out[1].end_s == 15.0 and len(done) == 2
    with pytest.raises(TwinrayInputError, match="cannot read"):
        map_tasks(parse_schedule, ["2x10", "2y10"], client=two_workers)
    with pytest.raises(TwinrayInputError, match="cannot read"):
        map_tasks(parse_schedule, ["2y10"], workers=0)


def test_bad_options():
    assert map_tasks(np.cumsum, [], workers=2) == []
    with pytest.raises(TwinrayInputError, match="--workers"):
        with dask_client(workers=0):
            pass
    with pytest.raises(TwinrayInputError, match="not a Dask address"):
        with dask_client(scheduler="my laptop"):
            pass
    with pytest.raises(TwinrayInputError, match="cannot reach"):
        with dask_client(scheduler="tcp://127.0.0.1:9", connect_timeout_s=1):
            pass
