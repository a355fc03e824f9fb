#!/usr/bin/env bash
# Side-by-side timing of mnemon against the PyTorch reference (shared/peers/torch_peer.py):
# the same learner and actor work, run alternately in one session, printed as ratios
# (mnemon time / PyTorch time; below 1.0 means mnemon is faster). Not run by CI.
#
# Usage: scripts/bench-vs-torch.sh [--make-venv] [--quick]
#   PEER_PY   python with torch (default: /work/peer-venv/bin/python, else .peer-venv/bin/python)
#   PEER      path of torch_peer.py (default: /work/shared/peers/torch_peer.py)
#   --make-venv  create .peer-venv with torch (about 2.8 GB download) if no python with torch is found
#   --quick      fewer configurations
set -euo pipefail
cd "$(dirname "$0")/.."

make_venv=0 quick=0
for a in "$@"; do
  case "$a" in
    --make-venv) make_venv=1 ;;
    --quick) quick=1 ;;
    *) echo "unknown option $a" >&2; exit 2 ;;
  esac
done

PEER=${PEER:-/work/shared/peers/torch_peer.py}
if [[ -z "${PEER_PY:-}" ]]; then
  if [[ -x /work/peer-venv/bin/python ]]; then PEER_PY=/work/peer-venv/bin/python
  elif [[ -x .peer-venv/bin/python ]]; then PEER_PY=.peer-venv/bin/python
  elif [[ $make_venv == 1 ]]; then
    python3 -m venv .peer-venv && .peer-venv/bin/pip install torch numpy
    PEER_PY=.peer-venv/bin/python
  else
    echo "no python with torch: set PEER_PY or pass --make-venv" >&2; exit 2
  fi
fi
[[ -f "$PEER" ]] || { echo "reference script not found: $PEER" >&2; exit 2; }

cargo build --release -q -p mnemon-cli
MNEMON=target/release/mnemon

field() { sed -E "s/.*\"$1\": ?([0-9.eE+-]+).*/\1/" <<<"$2"; }

run_pair() { # work unit args...
  local work=$1 unit=$2; shift 2
  local t m
  t=$("$PEER_PY" "$PEER" "$work" "$@")
  m=$("$MNEMON" bench "$work" "$@")
  local tv mv
  tv=$(field "median_$unit" "$t"); mv=$(field "median_$unit" "$m")
  printf '%-44s torch %9.3f %s   mnemon %9.3f %s   ratio %5.2f\n' "$work $*" "$tv" "$unit" "$mv" "$unit" \
    "$(awk -v a="$mv" -v b="$tv" 'BEGIN { printf "%.3f", a / b }')"
  echo "  torch:  $t"
  echo "  mnemon: $m"
}

echo "machine: $(nproc) cores, load $(cut -d' ' -f1-3 /proc/loadavg)"
run_pair learner ms --batch 32 --hidden 128 --threads 1
run_pair learner ms --batch 32 --hidden 128 --threads 2
if [[ $quick == 0 ]]; then
  run_pair learner ms --batch 32 --hidden 128 --threads 1 --target
  run_pair learner ms --batch 32 --hidden 256 --threads 1
  run_pair learner ms --batch 32 --hidden 256 --threads 2
fi
run_pair actor us --batch 1
run_pair actor us --batch 8
