#!/usr/bin/env bash
# `roofgate profile` end to end, this checkout against an earlier commit (default: the
# first release), whole processes in turns, on ResNet-50 (inline weights) and a
# 100,000-node Conv/Relu/Add chain. Usage: bash bench/against_ref.sh [REF] [RUNS]
set -euo pipefail
here="$(cd "$(dirname "$0")/.." && pwd)"
ref="${1:-11b5c0a}"
runs="${2:-3}"
work="$(mktemp -d)"
trap 'git -C "$here" worktree remove --force "$work/ref" >/dev/null 2>&1 || true; rm -rf "$work"' EXIT
git -C "$here" worktree add -q --detach "$work/ref" "$ref"
PYTHONPATH="$here:$here/bench" python3 - "$work" <<'PY'
import sys
from pathlib import Path
import onnx
import run  # bench/run.py: the chain builder
from gate.synth.archs import resnet50
from gate.synth.builder import save_model
work = Path(sys.argv[1])
save_model(resnet50(weights="inline", batch=1), work / "resnet50.onnx")
onnx.save(run._chain_model(100_000), str(work / "chain100k.onnx"))
PY
seconds() {  # tree model -> wall seconds of one whole `roofgate profile` process
  local start end
  start=$(date +%s.%N)
  (cd "$work" && PYTHONPATH="$1" python3 -c "from gate.cli import main; main()" \
      profile "$work/$2.onnx" -t ws-64x64-4mib >/dev/null 2>&1)
  end=$(date +%s.%N)
  echo "$end - $start" | bc
}
for model in resnet50 chain100k; do
  for _ in $(seq "$runs"); do
    echo "$model ref $(seconds "$work/ref" "$model") now $(seconds "$here" "$model")"
  done
done
