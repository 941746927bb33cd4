"""onnxruntime session settings shared by the live runtime and the bench.

Explicit intra-op threads and spinning off, so capture and display threads get CPU
(docs/architecture.md); one inter-op thread; full graph optimisation.
"""
from __future__ import annotations

import os

import onnxruntime as ort


def default_threads() -> int:
    return max(1, os.cpu_count() or 1)


def session_options(threads: int) -> ort.SessionOptions:
    so = ort.SessionOptions()
    so.intra_op_num_threads = max(1, threads)
    so.inter_op_num_threads = 1
    so.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    so.add_session_config_entry("session.intra_op.allow_spinning", "0")
    so.add_session_config_entry("session.inter_op.allow_spinning", "0")
    so.log_severity_level = 3
    return so


def make_session(model: str | bytes, threads: int) -> ort.InferenceSession:
    return ort.InferenceSession(model, sess_options=session_options(threads),
                                providers=["CPUExecutionProvider"])
