#!/usr/bin/env bash
# Reproduce assets/models/pose_landmark_full.onnx from scratch.
#
# What it does, in a throwaway folder (nothing outside it is changed unless
# --install is given):
#   1. makes a fresh venv and installs the pinned converter toolchain
#      (tensorflow-cpu 2.16.2, tf2onnx 1.17.0, onnx 1.16.2, onnxruntime 1.18.1;
#      a newer onnx fails with that TensorFlow's ml_dtypes);
#   2. downloads the mediapipe 0.10.14 wheel from PyPI (no dependencies) and
#      extracts the one file used: mediapipe/modules/pose_landmark/pose_landmark_full.tflite
#      (BlazePose GHUM "full" landmark model, Apache License 2.0);
#   3. checks the .tflite's sha256 against the one recorded in MODEL_CARD.md;
#   4. converts it with tf2onnx (opset 17);
#   5. runs the TFLite interpreter and ONNX Runtime on the same random inputs and
#      prints the largest difference per output (a conversion check);
#   6. with --install, copies the .onnx here and rewrites model.json's sha256.
#
# tf2onnx's output is not byte-for-byte reproducible (internal constant names
# differ between runs), so a fresh conversion can have a different sha256 from
# the committed file while computing the same function; step 5 is the check.
#
# Usage: bash assets/models/convert_blazepose.sh [--install] [--keep]
set -euo pipefail

HERE="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
INSTALL=0
KEEP=0
for arg in "$@"; do
  case "$arg" in
    --install) INSTALL=1 ;;
    --keep) KEEP=1 ;;
    *) echo "unknown option: $arg (use --install and/or --keep)" >&2; exit 2 ;;
  esac
done

TFLITE_SHA256="e9a5c5cb17f736fafd4c2ec1da3b3d331d6edbe8a0d32395855aeb2cdfd64b9f"
WHEEL_SPEC="mediapipe==0.10.14"
MEMBER="mediapipe/modules/pose_landmark/pose_landmark_full.tflite"

WORK="$(mktemp -d /tmp/kinemark-convert.XXXXXX)"
if [ "$KEEP" = 0 ]; then trap 'rm -rf "$WORK"' EXIT; else echo "work folder kept: $WORK"; fi
echo "work folder: $WORK"

python3 -m venv "$WORK/venv"
PY="$WORK/venv/bin/python"
# A machine-wide pip constraints file (e.g. /etc/xdg/pip) must not steer this
# throwaway venv: the versions below are the whole contract.
export PIP_CONSTRAINT=
"$PY" -m pip install --quiet --upgrade pip
"$PY" -m pip install --quiet tensorflow-cpu==2.16.2 tf2onnx==1.17.0 onnx==1.16.2 onnxruntime==1.18.1

# The wheel for CPython 3.11 on x86-64 Linux is the one the committed model came from.
"$PY" -m pip download --quiet --no-deps "$WHEEL_SPEC" -d "$WORK/wheel" \
  --only-binary=:all: --python-version 311 --platform manylinux2014_x86_64
WHEEL="$(ls "$WORK"/wheel/mediapipe-*.whl)"
echo "wheel: $(basename "$WHEEL")"

"$PY" - "$WHEEL" "$MEMBER" "$WORK/pose_landmark_full.tflite" <<'EOF'
import sys, zipfile
wheel, member, out = sys.argv[1:]
with zipfile.ZipFile(wheel) as z:
    open(out, "wb").write(z.read(member))
EOF

got="$(sha256sum "$WORK/pose_landmark_full.tflite" | cut -d' ' -f1)"
if [ "$got" != "$TFLITE_SHA256" ]; then
  echo "the .tflite in the wheel has sha256 $got, expected $TFLITE_SHA256; stopping" >&2
  exit 1
fi
echo "tflite sha256 ok: $got"

"$PY" -m tf2onnx.convert --tflite "$WORK/pose_landmark_full.tflite" \
  --output "$WORK/pose_landmark_full.onnx" --opset 17

"$PY" - "$WORK/pose_landmark_full.tflite" "$WORK/pose_landmark_full.onnx" <<'EOF'
import sys
import numpy as np
import onnxruntime as ort
import tensorflow as tf

tfl_path, onnx_path = sys.argv[1:]
interp = tf.lite.Interpreter(model_path=tfl_path)
interp.allocate_tensors()
tin = interp.get_input_details()[0]
touts = interp.get_output_details()
sess = ort.InferenceSession(onnx_path, providers=["CPUExecutionProvider"])
oin = sess.get_inputs()[0]
print("onnx input:", oin.name, oin.shape, oin.type)
for o in sess.get_outputs():
    print("onnx output:", o.name, o.shape)
rng = np.random.default_rng(0)
worst, scale = {}, {}
for _ in range(3):
    x = rng.random((1, 256, 256, 3), dtype=np.float32)
    interp.set_tensor(tin["index"], x)
    interp.invoke()
    t = {tuple(d["shape"]): interp.get_tensor(d["index"]) for d in touts}
    for o, val in zip(sess.get_outputs(), sess.run(None, {oin.name: x})):
        ref = t[tuple(val.shape)]
        worst[o.name] = max(worst.get(o.name, 0.0), float(np.abs(ref - val).max()))
        scale[o.name] = max(scale.get(o.name, 0.0), float(np.abs(ref).max()))
for name, d in worst.items():
    print(f"{name}: max |tflite - onnx| = {d:.3g}, max |tflite| = {scale[name]:.3g}, "
          f"relative {d / max(scale[name], 1e-12):.2g}")
EOF

sha="$(sha256sum "$WORK/pose_landmark_full.onnx" | cut -d' ' -f1)"
echo "onnx sha256: $sha ($(stat -c %s "$WORK/pose_landmark_full.onnx") bytes)"

if [ "$INSTALL" = 1 ]; then
  cp "$WORK/pose_landmark_full.onnx" "$HERE/pose_landmark_full.onnx"
  "$PY" - "$HERE/model.json" "$sha" <<'EOF'
import json, sys
path, sha = sys.argv[1:]
data = json.load(open(path))
data["sha256"] = sha
open(path, "w").write(json.dumps(data, indent=2) + "\n")
EOF
  echo "installed into $HERE (update the .onnx sha256 in MODEL_CARD.md too)"
fi
