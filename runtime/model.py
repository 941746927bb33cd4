"""Loading and validating a Limner model file (the contract in docs/architecture.md).

A model that is missing, empty, foreign, truncated, wrong-typed or of a newer format
raises ModelError with one line naming the file and the problem.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnxruntime as ort

from .errors import InputError
from .hashing import file_sha256
from .metadata import MetadataError, ModelMeta
from .session import make_session

MIN_SIDE = 16  # below this the nets' reflection pads and strides run out of pixels


class ModelError(InputError):
    pass


@dataclass
class Model:
    path: Path
    meta: ModelMeta
    session: ort.InferenceSession
    input_name: str
    output_name: str

    @property
    def size_multiple(self) -> int:
        return self.meta.size_multiple

    def run(self, frame_bgr: np.ndarray) -> np.ndarray:
        """(H, W, 3) uint8 BGR, any size from MIN_SIDE up -> the same shape, uint8 BGR (models
        written by this Limner pad to their size multiple inside the graph and crop back)."""
        h, w = frame_bgr.shape[:2]
        if h < MIN_SIDE or w < MIN_SIDE:
            raise ModelError(f"{self.path.name}: a {w}x{h} frame is too small; sides of at least "
                             f"{MIN_SIDE} px are needed")
        return self.session.run([self.output_name], {self.input_name: frame_bgr[None]})[0][0]

    def sha256(self) -> str:
        return file_sha256(self.path)



def _check_io(path: Path, sess: ort.InferenceSession) -> tuple[str, str]:
    ins, outs = sess.get_inputs(), sess.get_outputs()
    if len(ins) != 1 or len(outs) != 1:
        raise ModelError(f"{path}: expected one input and one output, found {len(ins)} and {len(outs)}")
    for role, t in (("input", ins[0]), ("output", outs[0])):
        if t.type != "tensor(uint8)":
            raise ModelError(f"{path}: {role} {t.name!r} is {t.type}, expected tensor(uint8) (NHWC BGR)")
        shape = t.shape
        if len(shape) != 4 or shape[3] != 3:
            raise ModelError(f"{path}: {role} {t.name!r} has shape {shape}, expected (N, H, W, 3)")
    return ins[0].name, outs[0].name


def load_model(path: str | Path, threads: int = 0) -> Model:
    """Open and validate a Limner model; threads 0 means all cores."""
    from .session import default_threads

    path = Path(path)
    if not path.exists():
        raise ModelError(f"{path}: no such model file")
    if path.is_dir():
        raise ModelError(f"{path}: is a folder, not a model file")
    if path.stat().st_size == 0:
        raise ModelError(f"{path}: file is empty")
    try:
        sess = make_session(str(path), threads or default_threads())
    except Exception as e:
        msg = str(e).strip().splitlines()[0] if str(e).strip() else type(e).__name__
        raise ModelError(f"{path}: cannot be loaded as an ONNX model (truncated, corrupt or "
                         f"not ONNX): {msg[:200]}") from None
    try:
        meta = ModelMeta.from_props(sess.get_modelmeta().custom_metadata_map)
    except MetadataError as e:
        raise ModelError(f"{path}: {e}") from None
    inp, out = _check_io(path, sess)
    return Model(path, meta, sess, inp, out)
