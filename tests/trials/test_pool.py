"""The supervisor of worker processes (pool.py): it learns of a worker's exit at once."""

from __future__ import annotations

import multiprocessing as mp
import subprocess
import sys
import time

import pytest

from kablate.trials.pool import wait_for_exit
from tests.conftest import REPO


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


HEAVY = ("torchvision", "scipy.stats", "statsmodels", "pandas", "matplotlib", "sklearn")


def test_a_worker_imports_none_of_what_only_the_report_and_the_analysis_need():
    # Each of these costs a worker (and the command, which imports the same) CPU seconds of its
    # start, while the cores are shared with the other workers' starts and the runner's checks.
    # The worker's own start-up is done too: the sweep, its costs and the digits data.
    code = (
        "import sys, kablate.trials.pool as p, kablate.trials.runner;"
        f"s = p.load_sweep({str(REPO / 'sweeps' / 'quickstart.toml')!r});"
        "p.build_catalog(s); p.prepare_data(s.data);"
        f"print(','.join(m for m in {HEAVY!r} if m in sys.modules))"
    )
    done = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        env={"PYTHONPATH": str(REPO / "src")},
        check=True,
    )
    assert done.stdout.strip() == ""
