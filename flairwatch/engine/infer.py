"""Model runner: ONNX Runtime on the CPU, one session built once and reused.

The session sees fixed-shape batches (the last batch is padded), so ONNX Runtime's CPU memory
arena stops growing after the first batch instead of growing to the largest input seen.
"""

from __future__ import annotations

import logging

import numpy as np

from flairwatch.engine.manifest import ModelManifest
from flairwatch.errors import ModelInvalid, StageFailed

log = logging.getLogger(__name__)


def _dim_ok(actual: object, expected: int) -> bool:
    """A declared ONNX dimension agrees if it is symbolic/unknown or equal."""
    return not isinstance(actual, int) or actual in (expected, -1, 0)


class Segmenter:
    """Runs a manifest's ONNX model on model-grid slices.

    Parameters
    ----------
    manifest : ModelManifest
        Validated manifest (hash already checked by :func:`flairwatch.engine.manifest.load_manifest`).
    threads : int
        ONNX Runtime intra-op threads; pass the CPUs this worker may use.
    """

    def __init__(self, manifest: ModelManifest, *, threads: int) -> None:
        import onnxruntime as ort

        self.manifest = manifest
        self.threads = max(1, threads)  # the CPUs this worker may use (the engine's stages too)
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = max(1, threads)
        opts.inter_op_num_threads = 1
        opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        opts.log_severity_level = 3
        try:
            self._session = ort.InferenceSession(
                str(manifest.file), sess_options=opts, providers=["CPUExecutionProvider"]
            )
        except Exception as exc:  # onnxruntime raises its own exception types
            raise ModelInvalid(f"ONNX Runtime cannot load {manifest.file.name}: {exc}") from None
        self._check_signature()

    def _check_signature(self) -> None:
        m = self.manifest
        inputs = {i.name: i for i in self._session.get_inputs()}
        outputs = {o.name: o for o in self._session.get_outputs()}
        if m.input_name not in inputs:
            raise ModelInvalid(
                f"model {m.label}: manifest input '{m.input_name}' not in the ONNX file "
                f"(it has {', '.join(inputs)})"
            )
        if m.output_name not in outputs:
            raise ModelInvalid(
                f"model {m.label}: manifest output '{m.output_name}' not in the ONNX file "
                f"(it has {', '.join(outputs)})"
            )
        shape = inputs[m.input_name].shape
        want = (m.channels, m.grid.shape[1], m.grid.shape[0])  # C, H (along j), W (along i)
        if len(shape) != 4 or not all(_dim_ok(a, e) for a, e in zip(shape[1:], want, strict=True)):
            raise ModelInvalid(
                f"model {m.label}: ONNX input shape {shape} disagrees with the manifest "
                f"(N, {want[0]}, {want[1]}, {want[2]})"
            )
        # Declared shapes can be symbolic: a dry run proves what the model really returns.
        probe = np.zeros((1, *want), dtype=np.float32)
        out = self._run(probe)
        expected = (1, len(m.output_channels), want[1], want[2])
        if out.shape != expected:
            raise ModelInvalid(
                f"model {m.label}: output shape {out.shape} disagrees with the manifest {expected}"
            )

    def _run(self, batch: np.ndarray) -> np.ndarray:
        result = self._session.run([self.manifest.output_name], {self.manifest.input_name: batch})
        return np.asarray(result[0], dtype=np.float32)

    def predict(self, x: np.ndarray) -> np.ndarray:
        """Model input (K, C, H, W) float32 -> probabilities (K, n_outputs, H, W) float32 in 0..1."""
        k = x.shape[0]
        bs = self.manifest.batch_size
        out = np.empty((k, len(self.manifest.output_channels), *x.shape[2:]), dtype=np.float32)
        batch = np.zeros((bs, *x.shape[1:]), dtype=np.float32)
        try:
            for start in range(0, k, bs):
                n = min(bs, k - start)
                batch[:n] = x[start : start + n]
                batch[n:] = 0.0
                out[start : start + n] = self._run(batch)[:n]
        except Exception as exc:  # onnxruntime raises its own exception types
            raise StageFailed(f"inference failed: {exc}") from None
        np.clip(out, 0.0, 1.0, out=out)
        return out
