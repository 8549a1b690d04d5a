"""A built network as an ONNX file, and an ONNX Runtime session that runs it on the CPU.

ONNX and ONNX Runtime are an optional extra (``pip install 'kablate[onnx]'``): nothing else in
kablate imports them. `onnx_missing` says why they cannot be used here, in words for the plan
table and the card; every caller reports that reason instead of failing.

The export uses ``torch.onnx.export`` with ``dynamo=False`` (the TorchScript-based exporter):
it needs no extra package beside ``onnx``, still works on torch 2.14, and exports every layer
kablate builds or rewrites (convs of any kernel, padding, dilation and groups; the explicit
``ZeroPad2d`` of even kernels). The batch axis is dynamic, so one file serves batch 1 and
the target batch.
"""

from __future__ import annotations

import importlib.util
import io
import warnings

import numpy as np
import torch

ONNX_EXTRA = "onnx"  # pyproject.toml's [project.optional-dependencies] key
ONNX_OPSET = 17  # ONNX opset 17 (2022): supported by onnxruntime ≥ 1.14
INPUT_NAME = "input"
OUTPUT_NAME = "logits"


def onnx_missing() -> str | None:
    """None when ONNX export and ONNX Runtime are usable here, else the reason they are not."""
    absent = [m for m in ("onnx", "onnxruntime") if importlib.util.find_spec(m) is None]
    if not absent:
        return None
    return f"{' and '.join(absent)} not installed (pip install 'kablate[{ONNX_EXTRA}]')"


def export_onnx(model: torch.nn.Module, in_shape: tuple[int, int, int]) -> bytes:
    """The ONNX file of ``model`` in eval mode for inputs of shape (N, *in_shape), N free."""
    was_training = model.training
    model.eval()
    buffer = io.BytesIO()
    try:
        with warnings.catch_warnings():  # the exporter's deprecation and folding notices
            warnings.simplefilter("ignore", DeprecationWarning)
            warnings.simplefilter("ignore", UserWarning)
            torch.onnx.export(
                model,
                (torch.zeros(1, *in_shape),),
                buffer,
                dynamo=False,
                opset_version=ONNX_OPSET,
                input_names=[INPUT_NAME],
                output_names=[OUTPUT_NAME],
                dynamic_axes={INPUT_NAME: {0: "batch"}, OUTPUT_NAME: {0: "batch"}},
            )
    finally:
        model.train(was_training)
    return buffer.getvalue()


def onnx_session(model_bytes: bytes, threads: int):
    """An ONNX Runtime session on the CPU with ``threads`` intra-op threads and one inter-op
    thread, running operators one after another (as torch's eager mode does)."""
    import onnxruntime

    options = onnxruntime.SessionOptions()
    options.intra_op_num_threads = threads
    options.inter_op_num_threads = 1
    options.execution_mode = onnxruntime.ExecutionMode.ORT_SEQUENTIAL
    options.log_severity_level = 3  # errors only: no warnings on the terminal
    return onnxruntime.InferenceSession(model_bytes, options, providers=["CPUExecutionProvider"])


def run_session(session, x: np.ndarray) -> np.ndarray:
    """The logits of ``session`` on ``x`` (float32, NCHW, C-contiguous)."""
    return session.run([OUTPUT_NAME], {INPUT_NAME: x})[0]


def onnxruntime_version() -> str:
    import onnxruntime

    return onnxruntime.__version__
