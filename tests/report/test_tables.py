"""The card's latency table: torch's and ONNX Runtime's medians with their spreads, side by
side, or the reason ONNX Runtime's are absent."""

from __future__ import annotations

from kablate.analysis.summary import analyze
from kablate.report.tables import latency_table
from kablate.spec.schema import PickSpec
from tests.analysis.synthetic import data_json, plan, rows, with_predictions


def timed_plan(with_ort: bool) -> dict:
    """Demo timings: variant i at (1 + i) ms [0.92, 1.08]×, ONNX Runtime at half of that."""
    p = plan(latency=True)
    for i, v in enumerate(p["variants"]):
        ms = 1.0 + i
        v.update(
            latency_q1_ms=0.92 * ms,
            latency_q3_ms=1.08 * ms,
            latency_batch_ms=8 * ms,
            latency_batch_q1_ms=7 * ms,
            latency_batch_q3_ms=9 * ms,  # IQR 25% of the median: noisy
            latency_rounds=30,
            latency_batch_size=16,
            latency_threads=2,
            latency_torch="2.x",
            ort_absent=None if with_ort else "onnxruntime not installed (pip install ...)",
        )
        if with_ort:
            v.update(
                ort_latency_ms=ms / 2,
                ort_latency_q1_ms=0.46 * ms,
                ort_latency_q3_ms=0.54 * ms,
                ort_latency_batch_ms=4 * ms,
                ort_latency_batch_q1_ms=3.9 * ms,
                ort_latency_batch_q3_ms=4.1 * ms,
                onnxruntime_version="1.x",
            )
    return p


def table(with_ort: bool) -> list[str]:
    a = analyze(with_predictions(rows()), [], timed_plan(with_ort), [], data_json(), PickSpec())
    return latency_table(a)


def test_onnx_runtime_sits_beside_torch_with_the_ratio_of_medians():
    lines = table(with_ort=True)
    assert lines[0] == "#### Latency"
    assert "| variant | torch @1 | torch @16 | ONNX Runtime @1 | ONNX Runtime @16 |" in lines[4]
    assert "30 interleaved rounds" in lines[2] and "2 thread(s), torch 2.x" in lines[2]
    assert "ONNX Runtime 1.x ran the network exported to ONNX" in lines[2]
    # base is variant 0: torch 1 [0.92, 1.08]; at 16: 8 [7, 9], noisy; ORT half of torch's
    base = next(line for line in lines if line.startswith("| base |"))
    cells = [c.strip() for c in base.strip("|").split("|")]
    assert cells == [
        "base",
        "1 [0.92, 1.08]",
        "8 [7, 9] !",
        "0.5 [0.46, 0.54]",
        "4 [3.9, 4.1]",
        "0.50",
    ]
    order = [line.split("|")[1].strip() for line in lines[6:-1]]
    assert order == ["base", "cheap", "big", "never"]  # by torch's median at batch 1


def test_without_onnx_runtime_the_card_says_why():
    lines = table(with_ort=False)
    assert (
        "ONNX Runtime latency is absent: onnxruntime not installed (pip install ...)." in lines[2]
    )
    base = next(line for line in lines if line.startswith("| base |"))
    assert [c.strip() for c in base.strip("|").split("|")][3:] == ["-", "-", "-"]


def test_no_table_without_latency():
    a = analyze(with_predictions(rows()), [], plan(), [], data_json(), PickSpec())
    assert latency_table(a) == []
