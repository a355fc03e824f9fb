"""Rescue drone on a ridge, a mnemon outside task (protocol: envs/PROTOCOL.md).
A beacon pings once, at the start, from the west or the east end of the ridge;
the drone must remember the side and fly there. Standard library only."""
import json
import random
import sys


def send(message):
    print(json.dumps(message), flush=True)


half, limit = 5, 30
for line in sys.stdin:
    msg = json.loads(line)
    if msg["type"] == "hello":
        half = msg["settings"].get("half_width", half)
        limit = msg["settings"].get("time_limit", limit)
        send({"version": 1, "observation": {"low": [-1, 0, 0], "high": [1, 1, 1]},
              "actions": ["fly-west", "hover", "fly-east"], "success": True})
    elif msg["type"] == "reset":
        beacon, pos, t = random.Random(msg["seed"]).choice([-half, half]), 0, 0
        send({"observation": [0.0, float(beacon < 0), float(beacon > 0)]})
    elif msg["type"] == "step":
        pos, t = pos + msg["action"] - 1, t + 1
        found, lost = pos == beacon, pos == -beacon
        ending = "terminal" if found or lost else "truncated" if t >= limit else "running"
        send({"observation": [pos / half, 0.0, 0.0], "reward": float(found) - 0.01,
              "ending": ending, "success": found})
    elif msg["type"] == "bye":
        break
