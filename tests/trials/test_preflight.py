"""The preflight: memory estimate against MemAvailable, one real training step, and a run that
is refused before its sweep definition is recorded (so the fixed sweep reruns as is)."""

from __future__ import annotations

import pytest
import torch

from kablate.costs.catalog import build_catalog
from kablate.errors import UsageError
from kablate.spec import load_sweep
from kablate.trials import RunOptions, run_sweep
from kablate.trials import preflight as pf


def fake_meminfo(tmp_path, monkeypatch, available_kb: int) -> None:
    path = tmp_path / "meminfo"
    path.write_text(
        f"MemTotal:       24683584 kB\nMemFree:          900000 kB\n"
        f"MemAvailable:   {available_kb:>8} kB\n"
    )
    monkeypatch.setattr(pf, "MEMINFO", path)


def test_available_memory_reads_memavailable_in_bytes(tmp_path, monkeypatch):
    fake_meminfo(tmp_path, monkeypatch, 1234)
    assert pf.available_memory() == 1234 * 1024
    monkeypatch.setattr(pf, "MEMINFO", tmp_path / "none")
    assert pf.available_memory() is None  # not Linux: no check, rather than a wrong one


def test_the_estimate_is_saved_activations_state_and_batch(tiny_sweep):
    catalog = build_catalog(load_sweep(tiny_sweep))
    item = pf.heaviest(catalog)
    batch = catalog.sweep.recipe.batch_size
    # digits: 1 × 8 × 8 fp32 images, the batch and its augmented copy
    expected = 2 * item.cost.act_mem_bytes + 16 * item.cost.params + 2 * batch * 64 * 4
    assert pf.step_bytes(item, batch) == expected
    others = [v for v in catalog.variants if v is not item]
    assert all(pf.step_bytes(v, batch) <= expected for v in others)
    assert item.name == "stem-5"  # the same maps, a larger stem kernel: more params


def test_a_step_that_cannot_fit_is_refused_naming_variant_and_sizes(
    tiny_sweep, tmp_path, monkeypatch
):
    catalog = build_catalog(load_sweep(tiny_sweep))
    need = pf.step_bytes(pf.heaviest(catalog), catalog.sweep.recipe.batch_size)
    fake_meminfo(tmp_path, monkeypatch, (3 * need) // 1024)
    pf.check_memory(catalog, n_workers=2)  # 2 workers fit in three steps' worth
    with pytest.raises(UsageError) as info:
        pf.check_memory(catalog, n_workers=4)
    message = str(info.value)
    assert str(tiny_sweep) in message and "variant stem-5 at batch size 64" in message
    assert "for 4 worker processes" in message and "run fewer --workers" in message


def test_each_worker_process_is_counted_with_its_own_copy_of_the_data(
    tiny_sweep, tmp_path, monkeypatch
):
    # Each worker process prepares the data for itself (pool.worker_main); this process's own
    # copy is allocated already, so one worker, which trains here, needs only its step.
    catalog = build_catalog(load_sweep(tiny_sweep))
    step = pf.step_bytes(pf.heaviest(catalog), catalog.sweep.recipe.batch_size)
    data = 300 * 1024 * 1024  # a prepared dataset of 300 MiB
    need = 2 * (step + data)
    fake_meminfo(tmp_path, monkeypatch, -(-need // 1024))  # /proc/meminfo counts in kB
    pf.check_memory(catalog, n_workers=2, data_bytes=data)
    fake_meminfo(tmp_path, monkeypatch, (need - 1) // 1024)
    with pytest.raises(
        UsageError,
        match=r"for 2 worker processes, each with its copy of the "
        r"data: 300 MiB",
    ):
        pf.check_memory(catalog, n_workers=2, data_bytes=data)
    fake_meminfo(tmp_path, monkeypatch, -(-step // 1024))
    pf.check_memory(catalog, n_workers=1, data_bytes=data)


def test_one_step_really_trains_and_evaluates(tiny_sweep, monkeypatch):
    catalog = build_catalog(load_sweep(tiny_sweep))
    calls = []
    real_step = torch.optim.SGD.step
    monkeypatch.setattr(
        torch.optim.SGD, "step", lambda self, *a: calls.append("step") or real_step(self, *a)
    )
    real_eval = torch.nn.Module.eval
    monkeypatch.setattr(
        torch.nn.Module, "eval", lambda self: calls.append("eval") or real_eval(self)
    )
    pf.try_one_step(catalog)
    assert calls[0] == "step" and "eval" in calls


@pytest.mark.parametrize(
    ("device", "failure", "words"),
    [
        ("bogus", None, ["on bogus", "RuntimeError"]),
        ("cpu", "DefaultCPUAllocator: can't allocate memory", ["can't allocate memory"]),
    ],
)
def test_a_failing_step_is_a_usage_error(tiny_sweep, monkeypatch, device, failure, words):
    catalog = build_catalog(load_sweep(tiny_sweep))
    if failure:

        def fail(*args, **kwargs):
            raise RuntimeError(failure + "\nmore lines of torch's")

        monkeypatch.setattr(torch.nn.functional, "cross_entropy", fail)
    with pytest.raises(UsageError) as info:
        pf.try_one_step(catalog, device=device)
    message = str(info.value)
    assert "could not train one step of variant stem-5 (the most expensive)" in message
    assert "\n" not in message
    for word in words:
        assert word in message


def test_a_run_refused_by_the_preflight_records_no_definition(tiny_sweep, tmp_path, monkeypatch):
    fake_meminfo(tmp_path, monkeypatch, 1024)  # 1 MiB available
    opts = RunOptions(results_root=tmp_path / "results", workers=1, show_progress=False)
    with pytest.raises(UsageError, match="MiB available"):
        run_sweep(tiny_sweep, opts)
    folder = tmp_path / "results" / "tiny"
    assert not (folder / "sweep.json").exists() and not (folder / "plan.json").exists()
    from kablate.trials.meta import DEFINITION_ATTR
    from kablate.trials.store import open_study

    study = open_study("tiny", folder, None, create=False)
    assert DEFINITION_ATTR not in study.user_attrs  # a fixed sweep file is not "changed"
