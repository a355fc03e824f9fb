#!/usr/bin/env bash
# Side-by-side timing of mnemon against the PyTorch reference (scripts/torch_peer.py):
# the same learner work at several sizes and thread counts, each cell measured as
# alternating runs of the two in one session, printed as a table of medians and ratios
# (mnemon time / PyTorch time; below 1.0 means mnemon is faster), with each side's
# matmul peak and the share of it the learner step reaches. Not run by CI.
#
# Usage: scripts/bench-vs-torch.sh [options]
#   --sizes "BxH[xO] ..."  learner sizes: batch x hidden [x observation width]
#                          (default "32x128 64x256 64x512"; observation width default 16)
#   --threads "1 2 4 8"    thread counts (default "1 2 4 8")
#   --rounds N             alternating runs per cell; the median of each side's medians is
#                          reported (default 3)
#   --iters N              timed learner steps per run (default 25)
#   --seq N --burn-in N    steps per sequence and burn-in (default 60 and 20)
#   --target               also time the target network's no-grad forward
#   --actor                also time the actor step (1 and 8 lanes)
#   --out PATH             also write the table to PATH.json and PATH.md
#   --make-venv            create .peer-venv with torch if no python with torch is found
# Environment:
#   MNEMON   the mnemon binary (default: build it with cargo and use target/release/mnemon)
#   PEER_PY  python with torch (default: /work/peer-venv/bin/python, else .peer-venv/bin/python)
#   PEER     the reference script (default: scripts/torch_peer.py beside this script)
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
cd "$here/.."

sizes="32x128 64x256 64x512" threads="1 2 4 8" rounds=3 iters=25 seq=60 burn_in=20
target=0 actor=0 out="" make_venv=0
while [[ $# -gt 0 ]]; do
  case "$1" in
    --sizes) sizes=$2; shift 2 ;;
    --threads) threads=$2; shift 2 ;;
    --rounds) rounds=$2; shift 2 ;;
    --iters) iters=$2; shift 2 ;;
    --seq) seq=$2; shift 2 ;;
    --burn-in) burn_in=$2; shift 2 ;;
    --target) target=1; shift ;;
    --actor) actor=1; shift ;;
    --out) out=$2; shift 2 ;;
    --make-venv) make_venv=1; shift ;;
    *) echo "bench-vs-torch.sh: unknown option $1 (see the comment at the top)" >&2; exit 2 ;;
  esac
done

PEER=${PEER:-$here/torch_peer.py}
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
if [[ -z "${MNEMON:-}" ]]; then
  cargo build --release -q -p mnemon-cli
  MNEMON=${CARGO_TARGET_DIR:-target}/release/mnemon
fi
[[ -x "$MNEMON" ]] || { echo "mnemon binary not found: $MNEMON" >&2; exit 2; }

cores=$(nproc)
python3 - "$MNEMON" "$PEER_PY" "$PEER" "$sizes" "$threads" "$rounds" "$iters" "$seq" "$burn_in" \
  "$target" "$actor" "$out" "$cores" <<'PY'
import json, statistics, subprocess, sys, time, os

(mnemon, peer_py, peer, sizes, threads, rounds, iters, seq, burn_in,
 target, actor, out, cores) = sys.argv[1:]
rounds, iters, cores = int(rounds), int(iters), int(cores)
threads = [int(t) for t in threads.split()]
target, actor = target == "1", actor == "1"

def run(cmd):
    r = subprocess.run(cmd, capture_output=True, text=True)
    if r.returncode != 0:
        sys.exit(f"failed ({r.returncode}): {' '.join(cmd)}\n{r.stderr}")
    return json.loads(r.stdout.strip().splitlines()[-1])

def both(args, field):
    """Alternating runs, the order swapped every round; median of each side's values."""
    m, t = [], []
    for i in range(rounds):
        order = [("m", [mnemon, "bench"] + args), ("t", [peer_py, peer] + args)]
        for who, cmd in (order if i % 2 == 0 else order[::-1]):
            (m if who == "m" else t).append(run(cmd)[field])
    return statistics.median(m), statistics.median(t)

load = open("/proc/loadavg").read().split()[:3]
print(f"machine: {cores} cores, load {' '.join(load)} at start; mnemon {mnemon}; torch via {peer_py}")
peaks = {}
for n in threads:
    args = ["matmul", "--size", "1024", "--threads", str(n)]
    peaks[n] = both(args, "gflop_per_s")
print("matmul peak (1024^3 f32, best of 10), GFLOP/s:")
for n in threads:
    note = "" if n <= cores else f"  (only {cores} cores: oversubscribed, not a real {n}-thread figure)"
    print(f"  {n:>2} threads: mnemon {peaks[n][0]:7.1f}   torch {peaks[n][1]:7.1f}{note}")

rows = []
hdr = ("| B | H | obs | threads | mnemon ms | torch ms | ratio | mnemon GFLOP/s | "
       "% of mnemon matmul peak | torch % of its peak |")
print()
print(hdr)
print("|---|---|---|---|---|---|---|---|---|---|")
for sz in sizes.split():
    parts = [int(x) for x in sz.split("x")]
    b, h = parts[0], parts[1]
    o = parts[2] if len(parts) > 2 else 16
    for n in threads:
        args = ["learner", "--batch", str(b), "--hidden", str(h), "--obs", str(o),
                "--seq", seq, "--burn-in", burn_in, "--threads", str(n), "--iters", str(iters)]
        if target:
            args.append("--target")
        m_ms, t_ms = both(args, "median_ms")
        # the work's matmul FLOPs, as mnemon counts them (same formula for both sides)
        l = int(seq) - int(burn_in)
        e, a = 128, 4
        fwd = 2 * b * (int(seq) * (o * e + e * 4 * h + h * 4 * h) + l * h * a)
        bwd = 2 * b * l * (o * e + 2 * (e * 4 * h + h * 4 * h) + 2 * h * a)
        gflop = (fwd + bwd) / 1e9
        mg, tg = gflop / (m_ms / 1e3), gflop / (t_ms / 1e3)
        row = dict(batch=b, hidden=h, obs=o, seq=int(seq), burn_in=int(burn_in), target=target,
                   threads=n, mnemon_ms=m_ms, torch_ms=t_ms, ratio=m_ms / t_ms,
                   matmul_gflop=gflop, mnemon_gflop_per_s=mg,
                   mnemon_matmul_peak=peaks[n][0], torch_matmul_peak=peaks[n][1],
                   mnemon_share_of_peak=mg / peaks[n][0], torch_share_of_peak=tg / peaks[n][1],
                   oversubscribed=n > cores)
        rows.append(row)
        flag = " *" if n > cores else ""
        print(f"| {b} | {h} | {o} | {n}{flag} | {m_ms:.2f} | {t_ms:.2f} | {m_ms / t_ms:.3f} | "
              f"{mg:.1f} | {100 * mg / peaks[n][0]:.0f}% | {100 * tg / peaks[n][1]:.0f}% |", flush=True)
if any(r["oversubscribed"] for r in rows):
    print(f"* more threads than the machine's {cores} cores: shows only that the split does not break")
actors = []
if actor:
    for lanes in (1, 8):
        m_us, t_us = both(["actor", "--batch", str(lanes)], "median_us")
        actors.append(dict(lanes=lanes, mnemon_us=m_us, torch_us=t_us, ratio=m_us / t_us))
        print(f"actor step, {lanes} lanes: mnemon {m_us:.1f} us, torch {t_us:.1f} us, ratio {m_us / t_us:.3f}")
load_end = open("/proc/loadavg").read().split()[:3]
print(f"load at end: {' '.join(load_end)}")
if out:
    doc = dict(cores=cores, load_start=load, load_end=load_end, rounds=rounds, iters=iters,
               matmul_peak={str(n): dict(mnemon=p[0], torch=p[1]) for n, p in peaks.items()},
               learner=rows, actor=actors,
               date=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()))
    with open(out + ".json", "w") as f:
        json.dump(doc, f, indent=1)
    with open(out + ".md", "w") as f:
        f.write(f"Learner step, mnemon vs PyTorch ({cores} cores, load {' '.join(load)} at start, "
                f"{rounds} alternating runs per cell, median of medians of {iters} steps)\n\n")
        f.write(hdr + "\n|---|---|---|---|---|---|---|---|---|---|\n")
        for r in rows:
            f.write(f"| {r['batch']} | {r['hidden']} | {r['obs']} | {r['threads']}{' *' if r['oversubscribed'] else ''} | "
                    f"{r['mnemon_ms']:.2f} | {r['torch_ms']:.2f} | {r['ratio']:.3f} | {r['mnemon_gflop_per_s']:.1f} | "
                    f"{100 * r['mnemon_share_of_peak']:.0f}% | {100 * r['torch_share_of_peak']:.0f}% |\n")
        f.write("\nmatmul peak (1024^3 f32), GFLOP/s: " + ", ".join(
            f"{n} threads mnemon {p[0]:.1f} torch {p[1]:.1f}" for n, p in peaks.items()) + "\n")
        for a in actors:
            f.write(f"\nactor step, {a['lanes']} lanes: mnemon {a['mnemon_us']:.1f} us, torch {a['torch_us']:.1f} us, ratio {a['ratio']:.3f}\n")
    print(f"wrote {out}.json and {out}.md")
PY
