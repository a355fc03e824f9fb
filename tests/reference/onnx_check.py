#!/usr/bin/env python3
"""Replays the episodes recorded by crates/export/tests/onnx_runtime.rs in Python
onnxruntime and compares `q` and `state_out` with mnemon's own acting path.

Each folder under TRACES (default: <target>/tmp/onnx-traces) holds `model.onnx` (the
export of a network with random weights) and `trace.json`: per step the inputs (`obs`,
`prev_action`, `prev_reward`, the lanes whose episode started over) and mnemon's `q` and
recurrent state after the step. The runtime carries its own state from step to step, as
a deployed policy would, and must stay within 1e-4 of mnemon everywhere.

Usage: python3 tests/reference/onnx_check.py [TRACES]   (exit 1 on a mismatch)
Needs: numpy, onnxruntime (CI pins them; see .ci/run); with the `onnx` package present,
each model is also validated by `onnx.checker.check_model(full_check=True)`.
"""
import json
import os
import sys

import numpy as np
import onnxruntime as ort

TOLERANCE = 1e-4


def check(folder):
    try:
        import onnx

        onnx.checker.check_model(os.path.join(folder, "model.onnx"), full_check=True)
    except ImportError:
        pass
    with open(os.path.join(folder, "trace.json")) as f:
        trace = json.load(f)
    sess = ort.InferenceSession(
        os.path.join(folder, "model.onnx"), providers=["CPUExecutionProvider"]
    )
    meta = json.loads(sess.get_modelmeta().custom_metadata_map["mnemon.policy"])
    names = {i.name for i in sess.get_inputs()}
    assert names == set(meta["inputs"]), (names, meta["inputs"])
    lanes = trace["lanes"]
    shape = [lanes] + trace["obs_shape"]
    state = np.zeros((lanes, meta["state_size"]), np.float32)
    dq = ds = 0.0
    for step in trace["steps"]:
        for lane in step["reset"]:
            state[lane] = 0.0
        feed = {"obs": np.asarray(step["obs"], np.float32).reshape(shape)}
        if "prev_action" in names:
            feed["prev_action"] = np.asarray(step["prev_action"], np.int64)
            feed["prev_reward"] = np.asarray(step["prev_reward"], np.float32)
        if "state" in names:
            feed["state"] = state
        out = sess.run(None, feed)
        q = np.asarray(step["q"], np.float32).reshape(lanes, -1)
        dq = max(dq, float(np.abs(out[0] - q).max()))
        if "state" in names:
            want = np.asarray(step["state"], np.float32).reshape(lanes, -1)
            ds = max(ds, float(np.abs(out[1] - want).max()))
            state = out[1]
    return len(trace["steps"]), dq, ds


def main():
    default = os.path.join(os.environ.get("CARGO_TARGET_DIR", "target"), "tmp", "onnx-traces")
    root = sys.argv[1] if len(sys.argv) > 1 else default
    folders = sorted(
        os.path.join(root, d)
        for d in os.listdir(root)
        if os.path.exists(os.path.join(root, d, "trace.json"))
    )
    if not folders:
        print(f"no traces under {root}: run `cargo test --release -p mnemon-export` first")
        return 1
    bad = 0
    print(f"onnxruntime {ort.__version__}, numpy {np.__version__}")
    for folder in folders:
        steps, dq, ds = check(folder)
        ok = dq <= TOLERANCE and ds <= TOLERANCE
        bad += not ok
        print(
            f"{'ok  ' if ok else 'FAIL'} {os.path.basename(folder):22s} {steps:4d} steps  "
            f"max |dq| {dq:.2e}  max |dstate| {ds:.2e}"
        )
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
