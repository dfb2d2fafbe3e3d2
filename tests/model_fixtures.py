"""A tiny ONNX model built with onnx.helper, to exercise the runner without the shipped model.

Its WMH output is sigmoid(gain * (x - 1.4)) of the centre input channel and its intracranial
output sigmoid(gain * (x - 0.3)): after foreground-median normalisation, normal tissue is near 1,
so voxels brighter than 1.4 times tissue become "lesion". With ``ventricles=True`` a third output,
sigmoid(gain * (0.7 - x)), marks voxels darker than 0.7 times tissue (inside the head, once the
engine restricts it to the intracranial mask) as ventricle. It is a fixed function, not a
trained model: tests use it to check plumbing, never segmentation quality.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import onnx
import yaml
from onnx import TensorProto, helper, numpy_helper


def build_tiny_onnx(
    path: Path,
    *,
    channels: int = 3,
    gain: float = 12.0,
    ventricles: bool = False,
    intracranial: bool = True,
) -> None:
    centre = channels // 2
    inits = [
        numpy_helper.from_array(np.array([centre], dtype=np.int64), "start"),
        numpy_helper.from_array(np.array([centre + 1], dtype=np.int64), "end"),
        numpy_helper.from_array(np.array([1], dtype=np.int64), "axis"),
        numpy_helper.from_array(np.array(gain, dtype=np.float32), "gain"),
        numpy_helper.from_array(np.array(1.4, dtype=np.float32), "wmh_level"),
        numpy_helper.from_array(np.array(0.3, dtype=np.float32), "icv_level"),
        numpy_helper.from_array(np.array(0.7, dtype=np.float32), "vent_level"),
    ]
    nodes = [
        helper.make_node("Slice", ["image", "start", "end", "axis"], ["centre"]),
        helper.make_node("Sub", ["centre", "wmh_level"], ["w0"]),
        helper.make_node("Mul", ["w0", "gain"], ["w1"]),
        helper.make_node("Sigmoid", ["w1"], ["wmh"]),
    ]
    outputs = ["wmh"]
    if intracranial:
        nodes += [
            helper.make_node("Sub", ["centre", "icv_level"], ["i0"]),
            helper.make_node("Mul", ["i0", "gain"], ["i1"]),
            helper.make_node("Sigmoid", ["i1"], ["icv"]),
        ]
        outputs.append("icv")
    if ventricles:
        nodes += [
            helper.make_node("Sub", ["vent_level", "centre"], ["v0"]),
            helper.make_node("Mul", ["v0", "gain"], ["v1"]),
            helper.make_node("Sigmoid", ["v1"], ["vent"]),
        ]
        outputs.append("vent")
    nodes.append(helper.make_node("Concat", outputs, ["probabilities"], axis=1))
    graph = helper.make_graph(
        nodes,
        "tiny_threshold",
        [helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", channels, "H", "W"])],
        [
            helper.make_tensor_value_info(
                "probabilities", TensorProto.FLOAT, ["N", len(outputs), "H", "W"]
            )
        ],
        initializer=inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    onnx.save(model, str(path))


def make_tiny_model(
    folder: Path,
    *,
    grid_shape: tuple[int, int] = (64, 64),
    spacing_mm: tuple[float, float] = (1.0, 1.0),
    channels: int = 3,
    threshold: float = 0.5,
    version: str = "0.0.1",
    ventricles: bool = False,
    intracranial: bool = True,
) -> Path:
    """Write ``tiny.onnx`` and its manifest ``tiny.yaml`` into ``folder``; return the manifest path.

    ``ventricles=True`` gives the model a third output channel, ``ventricles``;
    ``intracranial=False`` leaves out the ``intracranial`` channel (a WMH-only model, as a lab's
    own may be).
    """
    folder.mkdir(parents=True, exist_ok=True)
    onnx_path = folder / "tiny.onnx"
    build_tiny_onnx(onnx_path, channels=channels, ventricles=ventricles, intracranial=intracranial)
    out_channels = (
        ["wmh"]
        + (["intracranial"] if intracranial else [])
        + (["ventricles"] if ventricles else [])
    )
    manifest = {
        "name": "tiny-threshold",
        "version": version,
        "file": onnx_path.name,
        "sha256": hashlib.sha256(onnx_path.read_bytes()).hexdigest(),
        "intended_use": "research only (test fixture)",
        "input": {"name": "image", "layout": "NCHW", "channels": channels, "batch_size": 4},
        "grid": {
            "spacing_mm": list(spacing_mm),
            "shape": list(grid_shape),
            "through_plane": "keep",
        },
        "normalisation": {"method": "foreground_median"},
        "output": {"name": "probabilities", "channels": out_channels},
        "threshold": threshold,
    }
    path = folder / "tiny.yaml"
    path.write_text(yaml.safe_dump(manifest, sort_keys=False))
    return path
