#!/usr/bin/env bash
# Learning acceptance on the built-in tasks: trains each shipped spec (and its
# memoryless control), scores the final checkpoint over 200 greedy episodes (tiger:
# 5000) with `mnemon eval`, and prints one table row per run with its bound. Not run by CI (CI
# runs the short T-maze test in crates/engine/tests/learning.rs).
#
# Usage: scripts/acceptance.sh [GROUP...]    groups: tmaze recall cartpole tiger state (default: all)
set -euo pipefail
cd "$(dirname "$0")/.."
# MNEMON: a mnemon binary to use instead of building target/release/mnemon.
if [[ -z "${MNEMON:-}" ]]; then
  cargo build --release -q -p mnemon-cli
  MNEMON=$PWD/target/release/mnemon
fi
out=$(mktemp -d)
trap 'rm -rf "$out"' EXIT
groups=${*:-"tmaze recall cartpole tiger state"}

field() { python3 -c "import json,sys; d=json.loads(sys.argv[1]); v=d$2; print('-' if v is None else (round(v,3) if isinstance(v,float) else v))" "$1" ; }

# row NAME SPEC METRIC BOUND [--set ...]: METRIC is success_rate or mean_return;
# BOUND is like ">=0.95" or "<=0.6".
row() {
  local name=$1 spec=$2 metric=$3 bound=$4; shift 4
  local t0 t1 m e v ok
  t0=$(date +%s.%N)
  m=$("$MNEMON" train "$spec" --json --set run.out="\"$out\"" "$@")
  t1=$(date +%s.%N)
  e=$("$MNEMON" eval "$(field "$m" "['run_dir']")" --episodes "${EVAL_EPISODES:-200}" --seed 7 --json)
  v=$(field "$e" "['$metric']")
  # "opt": within 10% of the exact optimum that eval reports for tiger.
  [[ $bound == opt ]] && bound=">=$(field "$e" "['optimum_discounted_return'] - 0.1 * abs(d['optimum_discounted_return'])")"
  ok=$(python3 -c "import sys; v=float(sys.argv[1]); op=sys.argv[2][:2]; b=float(sys.argv[2][2:]); print('pass' if (v>=b if op=='>=' else v<=b) else 'MISS')" "$v" "$bound")
  printf '%-34s %7.1f %9s %8s %-12s %8s %-7s %6s %s\n' "$name" "$(python3 -c "print($t1-$t0)")" \
    "$(field "$m" "['env_steps']")" "$(field "$m" "['learner_steps']")" "$metric" "$v" "$bound" "$ok" \
    "$(field "$e" "['mean_discounted_return']")"
}

echo "machine: $(nproc) cores, load $(cut -d' ' -f1-3 /proc/loadavg)"
printf '%-34s %7s %9s %8s %-12s %8s %-7s %6s %s\n' run wall_s env_steps updates metric value bound result discounted
for g in $groups; do
  case $g in
    tmaze)
      for s in 1 2 3; do row "tmaze L=10 lstm seed $s" specs/tmaze-lstm.toml success_rate ">=0.95" --set run.seed=$s; done
      row "tmaze L=10 none seed 1" specs/tmaze-none.toml success_rate "<=0.6" ;;
    recall)
      row "recall S=4 D=8 lstm" specs/recall.toml success_rate ">=0.95"
      row "recall S=4 D=8 none" specs/recall.toml success_rate "<=0.35" --set 'agent.memory={kind="none"}' ;;
    cartpole)
      row "cartpole-positions lstm" specs/cartpole-positions.toml mean_return ">=450"
      row "cartpole-positions none" specs/cartpole-positions.toml mean_return "<=300" --set 'agent.memory={kind="none"}'
      row "cartpole (full) none" specs/cartpole.toml mean_return ">=475" ;;
    tiger)
      # A tiger episode's return swings by 110 with one opening: 200 episodes leave a 95%
      # interval some 9 wide, so tiger is scored over 5000.
      EVAL_EPISODES=5000 row "tiger lstm (vs exact optimum)" specs/tiger.toml mean_discounted_return opt
      # Without memory the best is to listen forever, -8.03 over 10 steps at discount
      # 0.95: opening on one growl loses 6.5 on average (worked out by hand).
      EVAL_EPISODES=5000 row "tiger none (always listening: -8.03)" specs/tiger.toml mean_discounted_return "<=-8.0" --set 'agent.memory={kind="none"}' ;;
    state)
      for st in stored zero; do
        row "tmaze L=20 start_state=$st" specs/tmaze-lstm.toml success_rate ">=0.95" --set task.length=20 --set replay.sequence=24 --set replay.overlap=12 --set run.seed=2 --set replay.start_state="\"$st\""
        python3 - "$out" "$st" <<'EOF'
import glob, json, os, sys
runs = sorted(glob.glob(os.path.join(sys.argv[1], "*", "*")), key=os.path.getmtime)
recs = [json.loads(l) for l in open(os.path.join(runs[-1], "metrics.jsonl")) if l.strip()]
d = [(r["q_discrepancy_first"], r["q_discrepancy_last"]) for r in recs
     if r.get("kind") == "train" and r.get("q_discrepancy_first") is not None]
tail = d[len(d) // 2:] or d
f = sum(x for x, _ in tail) / max(len(tail), 1); l = sum(y for _, y in tail) / max(len(tail), 1)
print(f"  {sys.argv[2]}: Q-value discrepancy (mean over the second half of training) first {f:.4f}, last {l:.4f}")
EOF
      done ;;
    *) echo "unknown group $g" >&2; exit 2 ;;
  esac
done
