#!/usr/bin/env bash
# Time to a solved T-maze: mnemon against the hand-written PyTorch agent
# (shared/peers/tmaze_peer.py), on the same corridor length, time limit and seeds, one
# after the other, each with one thread per side as it sets itself up. Prints a table
# per seed and the ratio of medians. Not run by CI.
#
# Usage: scripts/race.sh [--length L] [--seeds "100 101 102"] [--spec SPEC] [--cap S] [--memoryless] [--set KEY=VALUE]...
#   --set     passed on to mnemon train (e.g. --set replay.sequence=24 for L=20)
#   PEER_PY   python with torch and numpy (default: /work/peer-venv/bin/python, else .peer-venv/bin/python)
#   PEER      path of tmaze_peer.py (default: ../shared/peers/tmaze_peer.py beside the repository)
#
# Time to target counts from process start (start-up included) to the end of the
# evaluation that first reached success >= 0.95 (mnemon: the spec's `run.stop`; the
# peer: --target 0.95). Evaluation time is reported separately: the two evaluate on
# their own cadence (mnemon: the spec's `run.eval`; the peer: 100 episodes every 5k
# env steps). Both use the peer's time limit of 4 L steps.
set -euo pipefail
cd "$(dirname "$0")/.."

L=10 seeds="100 101 102 103 104" spec=specs/tmaze-lstm.toml cap=600 memoryless=0 sets=()
while [[ $# -gt 0 ]]; do
  case "$1" in
    --length) L=$2; shift 2 ;;
    --seeds) seeds=$2; shift 2 ;;
    --spec) spec=$2; shift 2 ;;
    --cap) cap=$2; shift 2 ;;
    --memoryless) memoryless=1; shift ;;
    --set) sets+=(--set "$2"); shift 2 ;;
    *) echo "unknown option $1" >&2; exit 2 ;;
  esac
done

# The peer sits in shared/ beside the repository.
PEER=${PEER:-$PWD/../shared/peers/tmaze_peer.py}
if [[ -z "${PEER_PY:-}" ]]; then
  if [[ -x /work/peer-venv/bin/python ]]; then PEER_PY=/work/peer-venv/bin/python
  elif [[ -x .peer-venv/bin/python ]]; then PEER_PY=.peer-venv/bin/python
  else echo "no python with torch: set PEER_PY (see DEVELOPERS.md)" >&2; exit 2; fi
fi
[[ -f "$PEER" ]] || { echo "peer script not found: $PEER" >&2; exit 2; }

# MNEMON: a mnemon binary to use instead of building target/release/mnemon.
if [[ -z "${MNEMON:-}" ]]; then
  cargo build --release -q -p mnemon-cli
  MNEMON=$PWD/target/release/mnemon
fi
out=$(mktemp -d)
trap 'rm -rf "$out"' EXIT
limit=$((4 * L))
now() { date +%s.%N; }
num() { python3 -c "import json,sys; d=json.loads(sys.argv[1]); v=d$2; print('-' if v is None else v)" "$1"; }

peer_extra=() mn_extra=()
if [[ $memoryless == 1 ]]; then peer_extra=(--memoryless); mn_extra=(--set 'agent.memory={kind="none"}'); fi

echo "machine: $(nproc) cores, load $(cut -d' ' -f1-3 /proc/loadavg); T-maze L=$L, time limit $limit; mnemon spec $spec ${sets[*]}"
printf '%-6s | %-7s %9s %10s %8s %8s %7s | %-7s %9s %10s %8s %8s %7s\n' \
  seed peer "s->0.95" "steps" updates eval_s final mnemon "s->0.95" "steps" updates eval_s final
peer_times=() mn_times=() peer_steps=() mn_steps=()
for s in $seeds; do
  t0=$(now)
  p=$("$PEER_PY" "$PEER" --L "$L" --seed "$s" --threads 1 --cap_seconds "$cap" "${peer_extra[@]}")
  t1=$(now)
  m=$("$MNEMON" train "$spec" --json --set task.length="$L" --set task.time_limit="$limit" \
      --set run.seed="$s" --set run.out="\"$out\"" --set run.budget="\"${cap}s\"" "${mn_extra[@]}" "${sets[@]}")
  t2=$(now)
  p_solved=$(num "$p" "['solved']")
  p_t=$([[ $p_solved == True ]] && num "$p" "['seconds_to_target']" || echo -)
  m_t=$(python3 -c "import json,sys; d=json.loads(sys.argv[1]); print(round(float(sys.argv[2])-float(sys.argv[3]),2) if d['stopped_by']=='target' else '-')" "$m" "$t2" "$t1")
  # The peer's seconds_to_target is measured inside the process; add its start-up.
  if [[ $p_t != - ]]; then
    p_wall=$(num "$p" "['wall']")
    p_t=$(python3 -c "print(round(float('$p_t') + ($t1 - $t0) - float('$p_wall'), 2))")
  fi
  p_steps=$(num "$p" "['env_steps_to_target']"); m_steps=$(num "$m" "['target_reached_at']")
  printf '%-6s | %-7s %9s %10s %8s %8s %7s | %-7s %9s %10s %8s %8s %7s\n' "$s" "" "$p_t" "$p_steps" \
    "$(num "$p" "['updates']")" "$(num "$p" "['eval_seconds']" | cut -c1-5)" "$(num "$p" "['final_eval']")" \
    "" "$m_t" "$m_steps" "$(num "$m" "['learner_steps']")" "$(num "$m" "['phases']['evaluation']" | cut -c1-5)" \
    "$(num "$m" "['eval_success_rate']")"
  echo "  peer:   $p" >> "$out/raw.txt"
  echo "  mnemon: $m" >> "$out/raw.txt"
  peer_times+=("$p_t"); mn_times+=("$m_t"); peer_steps+=("$p_steps"); mn_steps+=("$m_steps")
done
python3 - "${peer_times[*]}" "${mn_times[*]}" "${peer_steps[*]}" "${mn_steps[*]}" <<'EOF'
import statistics, sys
# An unsolved seed counts as infinitely slow, so a median over unsolved seeds is inf.
def vals(s): return [float('inf') if x == '-' else float(x) for x in s.split()]
pt, mt, ps, ms = (vals(a) for a in sys.argv[1:5])
n = len(pt)
solved = lambda v: sum(x != float('inf') for x in v)
med = statistics.median
print(f"solved: peer {solved(pt)}/{n}, mnemon {solved(mt)}/{n}")
print(f"median seconds to target: peer {med(pt):.2f}, mnemon {med(mt):.2f}, ratio mnemon/peer {med(mt)/med(pt):.2f}")
print(f"median env steps to target: peer {med(ps):.0f}, mnemon {med(ms):.0f}, ratio mnemon/peer {med(ms)/med(ps):.2f}")
EOF
echo "raw JSON lines:"; cat "$out/raw.txt"
