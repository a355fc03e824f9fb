#!/usr/bin/env python3
"""Plays the T-maze with a policy exported by `mnemon export`, outside mnemon.

Needs only numpy and onnxruntime. The T-maze is re-implemented here in a few lines from
its description in mnemon's docs (`mnemon tasks tmaze`): a corridor of `length` cells,
a cue on the first step (`[0,1,1]` = goal north, `[1,1,0]` = goal south), corridor cells
`[1,0,1]`, the junction `[0,1,0]`; actions north, east, south, west; +4 for the right arm,
-0.1 for the wrong arm or a wall; the episode is cut after `time_limit` steps
(3 * (length + 2) when 0). The maze's size comes from the spec stored in the model.

    mnemon train specs/tmaze-lstm.toml
    mnemon export runs/tmaze-lstm --out tmaze.onnx
    python3 examples/deploy/play_tmaze.py tmaze.onnx --episodes 1000
"""
import argparse
import json
import re

import numpy as np
import onnxruntime as ort

NORTH, EAST, SOUTH, WEST = range(4)


class TMaze:
    def __init__(self, length, time_limit, rng):
        self.length = length
        self.time_limit = time_limit or 3 * (length + 2)
        self.rng = rng

    def obs(self):
        if self.pos == 0 and self.t == 0:
            return [0.0, 1.0, 1.0] if self.goal_north else [1.0, 1.0, 0.0]
        if self.pos == self.length:
            return [0.0, 1.0, 0.0]
        return [1.0, 0.0, 1.0]

    def reset(self):
        self.goal_north = bool(self.rng.random() < 0.5)
        self.pos, self.t = 0, 0
        return self.obs()

    def step(self, action):
        """Returns (obs, reward, done, success)."""
        self.t += 1
        at_junction = self.pos == self.length
        if action in (NORTH, SOUTH) and at_junction:
            correct = (action == NORTH) == self.goal_north
            return self.obs(), (4.0 if correct else -0.1), True, correct
        reward = 0.0
        if action == EAST and not at_junction:
            self.pos += 1
        elif action == WEST and self.pos > 0:
            self.pos -= 1
        else:
            reward = -0.1  # a wall: stay
        if self.t >= self.time_limit:
            return self.obs(), reward, True, False
        return self.obs(), reward, False, False


def spec_int(spec_toml, key, default):
    """An integer of the stored spec's [task] table (tomllib needs Python 3.11)."""
    try:
        import tomllib

        return int(tomllib.loads(spec_toml)["task"].get(key, default))
    except ImportError:
        task = spec_toml.split("[task]", 1)[1].split("\n[", 1)[0]
        m = re.search(rf"^{key}\s*=\s*(\d+)", task, re.M)
        return int(m.group(1)) if m else default


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("model", help="an ONNX file written by `mnemon export`")
    ap.add_argument("--episodes", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()

    sess = ort.InferenceSession(args.model, providers=["CPUExecutionProvider"])
    meta = sess.get_modelmeta().custom_metadata_map
    policy = json.loads(meta["mnemon.policy"])
    if policy["task"] != "tmaze":
        raise SystemExit(f"{args.model}: a policy for task {policy['task']}, not tmaze")
    maze = TMaze(
        spec_int(meta["mnemon.spec"], "length", 10),
        spec_int(meta["mnemon.spec"], "time_limit", 0),
        np.random.default_rng(args.seed),
    )
    inputs = set(policy["inputs"])

    successes, total_return, steps = 0, 0.0, 0
    by_cue = {True: [0, 0, 0.0, 0], False: [0, 0, 0.0, 0]}  # episodes, successes, return, steps
    for _ in range(args.episodes):
        obs = maze.reset()
        cue = by_cue[maze.goal_north]
        cue[0] += 1
        state = np.zeros((1, policy["state_size"]), np.float32)  # zeros at an episode start
        prev_action, prev_reward = -1, 0.0  # -1: no previous action
        while True:
            feed = {"obs": np.asarray([obs], np.float32)}
            if "state" in inputs:
                feed["state"] = state
            if "prev_action" in inputs:
                feed["prev_action"] = np.asarray([prev_action], np.int64)
                feed["prev_reward"] = np.asarray([prev_reward], np.float32)
            out = sess.run(None, feed)
            action = int(np.argmax(out[0][0]))  # greedy: the first maximum
            if "state" in inputs:
                state = out[1]
            obs, reward, done, success = maze.step(action)
            total_return += reward
            steps += 1
            cue[2] += reward
            cue[3] += 1
            prev_action, prev_reward = action, reward
            if done:
                successes += success
                cue[1] += success
                break
    print(
        f"{args.episodes} episodes of the T-maze (length {maze.length}), outside mnemon: "
        f"success {100.0 * successes / args.episodes:.1f}%, "
        f"mean return {total_return / args.episodes:.4f}, "
        f"mean length {steps / args.episodes:.2f} steps"
    )
    for north, (n, won, ret, length) in by_cue.items():
        if n:
            print(
                f"  goal {'north' if north else 'south'}: {n} episodes, success "
                f"{100.0 * won / n:.1f}%, mean return {ret / n:.4f}, mean length {length / n:.2f}"
            )


if __name__ == "__main__":
    main()
