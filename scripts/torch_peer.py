"""PyTorch reference for mnemon's benchmarks: the same work done the way a practitioner
would hand-write it in PyTorch on CPU. mnemon's own benchmark must do exactly this work
so that the two can be timed side by side in one run and reported as a ratio.

This copy takes the sizes as options (--obs, --hidden, --batch, --seq, --burn-in), as
`mnemon bench learner` does, and adds `matmul` (the machine's matmul peak through torch).

Work definitions (shared by both sides):
  learner: B sequences of T steps (default 60), the first 20 burn-in (no gradient, state
           detached), observation O (default 16) -> Linear(O,128) + ReLU -> LSTM(H) ->
           Linear(H,4) Q head;
           gather Q at the taken actions of the 40 learned steps; MSE to given targets;
           backward; Adam(lr 1e-4). With --target also a no-grad forward of a target
           network over all steps (as the double-Q target needs).
  actor:   one step of the same network for a batch of lanes, no gradient, Q values
           copied to host memory, recurrent state carried to the next call.
  matmul:  best time of a --size square f32 matrix product, as GFLOP/s.

Usage: python3 torch_peer.py learner --batch 32 --hidden 128 [--obs 16] [--seq 60] [--burn-in 20]
                                     [--target] [--threads 1] [--iters 25]
       python3 torch_peer.py actor --batch 1 [--threads 1] [--iters 2000]
       python3 torch_peer.py matmul [--size 1024] [--threads 1]
Prints one JSON object: {"work": ..., "impl": "torch-nn-lstm", "median_ms" or "median_us", ...}.

Install (a CPU machine still pulls the CUDA wheels from the registry; about 2.8 GB download,
5.4 GB on disk): python3 -m venv .peer-venv && .peer-venv/bin/pip install torch numpy
"""
import argparse, json, statistics, time

import torch
import torch.nn as nn
import torch.nn.functional as F

EMBED, ACTIONS = 128, 4


class Net(nn.Module):
    def __init__(self, hidden, obs):
        super().__init__()
        self.torso = nn.Linear(obs, EMBED)
        self.lstm = nn.LSTM(EMBED, hidden)  # time-major [T, B, E]
        self.head = nn.Linear(hidden, ACTIONS)

    def unroll(self, obs, h, c):
        out, (h, c) = self.lstm(F.relu(self.torso(obs)), (h[None], c[None]))
        return out, h[0], c[0]


def learner(a):
    T, BURN, OBS = a.seq, a.burn_in, a.obs
    net, tgt = Net(a.hidden, OBS), (Net(a.hidden, OBS) if a.target else None)
    opt = torch.optim.Adam(net.parameters(), lr=1e-4)
    g = torch.Generator().manual_seed(0)
    L, B, H = T - BURN, a.batch, a.hidden
    batches = [dict(obs=torch.randn(T, B, OBS, generator=g),
                    h0=0.1 * torch.randn(B, H, generator=g), c0=0.1 * torch.randn(B, H, generator=g),
                    act=torch.randint(0, ACTIONS, (L * B, 1), generator=g),
                    y=torch.randn(L * B, 1, generator=g)) for _ in range(4)]
    times = []
    for it in range(5 + a.iters):
        b = batches[it % 4]
        t0 = time.perf_counter()
        if tgt is not None:
            with torch.no_grad():
                hs, _, _ = tgt.unroll(b["obs"], b["h0"], b["c0"])
                tgt.head(hs).max(-1)
        with torch.no_grad():
            _, h, c = net.unroll(b["obs"][:BURN], b["h0"], b["c0"])
        hs, _, _ = net.unroll(b["obs"][BURN:], h, c)
        loss = F.mse_loss(net.head(hs.reshape(L * B, H)).gather(1, b["act"]), b["y"])
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
        if it >= 5:
            times.append((time.perf_counter() - t0) * 1e3)
    return dict(work="learner", impl="torch-nn-lstm", batch=B, hidden=H, obs=OBS, seq=T,
                burn_in=BURN, target=a.target,
                threads=a.threads, iters=a.iters, median_ms=statistics.median(times),
                min_ms=min(times), max_ms=max(times))


def actor(a):
    net = Net(a.hidden, a.obs)
    obs = torch.randn(1, a.batch, a.obs)
    h = torch.zeros(a.batch, a.hidden)
    c = torch.zeros(a.batch, a.hidden)
    times = []
    with torch.inference_mode():
        for it in range(200 + a.iters):
            t0 = time.perf_counter()
            out, h, c = net.unroll(obs, h, c)
            q = net.head(out[0]).numpy()
            if it >= 200:
                times.append((time.perf_counter() - t0) * 1e6)
    return dict(work="actor", impl="torch-nn-lstm", batch=a.batch, hidden=a.hidden,
                threads=a.threads, iters=a.iters, median_us=statistics.median(times),
                min_us=min(times), max_us=max(times), check=float(q[0, 0]))


def matmul(a):
    n = a.size
    x, y = torch.randn(n, n), torch.randn(n, n)
    best = float("inf")
    for rep in range(a.iters + 1):
        t0 = time.perf_counter()
        torch.mm(x, y)
        if rep > 0:
            best = min(best, time.perf_counter() - t0)
    return dict(work="matmul", impl="torch-mm", size=n, threads=a.threads, reps=a.iters,
                gflop_per_s=2.0 * n ** 3 / best / 1e9)


if __name__ == "__main__":
    p = argparse.ArgumentParser()
    p.add_argument("work", choices=["learner", "actor", "matmul"])
    p.add_argument("--batch", type=int, default=32)
    p.add_argument("--hidden", type=int, default=128)
    p.add_argument("--obs", type=int, default=16)
    p.add_argument("--seq", type=int, default=60)
    p.add_argument("--burn-in", type=int, default=20)
    p.add_argument("--size", type=int, default=1024)
    p.add_argument("--target", action="store_true")
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--iters", type=int, default=None)
    a = p.parse_args()
    if a.iters is None:
        a.iters = {"learner": 25, "actor": 2000, "matmul": 10}[a.work]
    if not 0 <= a.burn_in < a.seq:
        p.error("--burn-in must be at least 0 and less than --seq")
    torch.set_num_threads(a.threads)
    torch.set_num_interop_threads(1)
    print(json.dumps({"learner": learner, "actor": actor, "matmul": matmul}[a.work](a)))
