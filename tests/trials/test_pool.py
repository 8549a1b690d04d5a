"""The supervisor of worker processes (pool.py): it learns of a worker's exit at once."""

from __future__ import annotations

import multiprocessing as mp
import time

import pytest

from kablate.trials.pool import wait_for_exit


@pytest.mark.timeout(60)
def test_the_supervisor_wakes_on_a_worker_exit_not_on_a_clock():
    ctx = mp.get_context("spawn")
    ends, stays = (
        ctx.Process(target=time.sleep, args=(0.2,)),
        ctx.Process(target=time.sleep, args=(600,)),
    )
    ends.start()
    stays.start()
    try:
        # A timeout far beyond the test's own (pytest-timeout): a supervisor that slept out its
        # period instead of waiting on the sentinels would be stopped as hung.
        assert wait_for_exit([ends, stays], timeout=3600) == [ends]
        assert ends.exitcode == 0 and stays.exitcode is None
        # A worker that has ended is not waited on again; the one still running is.
        assert wait_for_exit([ends, stays], timeout=0.05) == []
    finally:
        stays.kill()
        stays.join()
