#!/usr/bin/env python3
"""A deliberately faulty explore worker for tarn's tests (numpy only).

Round 1 always succeeds (one sample: the start point, with its Müller–Brown energy).
From round 2 on it misbehaves as the mode file named by argv[1] says:
  ok      behave well            exit    exit with status 3
  hang    sleep for an hour      badjson write a result that is not JSON
  shape   samples of 3 columns   nan     a NaN energy
  escape  an output path outside the task directory
  slow    sleep 1 s, then behave well (in every round)
  orphan  start a child that sleeps 30 s, then behave well
  ansi    write terminal escape sequences to stderr, then exit with status 3
  ansifail   report failure in a result with only status and a message holding
             escape sequences
  failed  report failure in a result with only status and message
  ansimetric behave well, with a metric whose name holds escape sequences
  metrics    behave well, with 1001 metrics (one more than tarn accepts)
"""
import json
import os
import subprocess
import sys
import time

import numpy as np

A = np.array([-200.0, -100.0, -170.0, 15.0])
a = np.array([-1.0, -1.0, -6.5, 0.7])
b = np.array([0.0, 0.0, 11.0, 0.6])
c = np.array([-10.0, -10.0, -6.5, 0.7])
X0 = np.array([1.0, 0.0, -0.5, -1.0])
Y0 = np.array([0.0, 0.5, 1.5, 1.0])


def energy(p):
    dx, dy = p[0] - X0, p[1] - Y0
    return float(np.sum(A * np.exp(a * dx * dx + b * dx * dy + c * dy * dy)))


ESCAPES = "\x1b]0;pwned\x07\x1b[2J\x1b[31m"


def write_result(outputs, metrics=None):
    res = {"protocol": 1, "status": "ok", "outputs": outputs, "metrics": metrics or {}, "energy_evals": 1}
    with open("out/result.json", "w") as f:
        json.dump(res, f)


def write_failure(message):
    with open("out/result.json", "w") as f:
        json.dump({"status": "failed", "message": message}, f)


def main():
    task = json.load(open(os.environ["TARN_TASK"]))
    mode = open(sys.argv[1]).read().strip()
    start = np.load(task["inputs"]["start"])
    x = start[:1].copy()
    # A tiny seeded move so that samples depend on the task's seed.
    x += 1e-3 * np.random.default_rng(task["seed"]).standard_normal(x.shape)
    e = np.array([energy(x[0])])
    if mode == "slow":
        time.sleep(1)
    if task["round"] >= 2:
        if mode == "exit":
            print("worker: simulated crash", file=sys.stderr)
            sys.exit(3)
        if mode == "hang":
            time.sleep(3600)
        if mode == "badjson":
            open("out/result.json", "w").write('{"protocol": 1, "status": ')
            return
        if mode == "shape":
            x = np.zeros((1, 3))
        if mode == "nan":
            e = np.array([float("nan")])
        if mode == "escape":
            np.save("out/samples.npy", x)
            np.save("out/energies.npy", e)
            write_result({"samples": "../../escaped.npy", "energies": "out/energies.npy"})
            return
        if mode == "orphan":
            subprocess.Popen(["sleep", "30"])
        if mode == "ansi":
            print("worker: " + ESCAPES + "red alert", file=sys.stderr)
            sys.exit(3)
        if mode == "ansifail":
            write_failure("no convergence " + ESCAPES + "in 50 steps")
            return
        if mode == "failed":
            write_failure("no convergence in 50 steps")
            return
    metrics = {}
    if mode == "ansimetric":
        metrics = {"accept" + ESCAPES: 0.5}
    if mode == "metrics" and task["round"] >= 2:
        metrics = {"m%d" % i: 1.0 for i in range(1001)}
    np.save("out/samples.npy", x)
    np.save("out/energies.npy", e)
    write_result({"samples": "out/samples.npy", "energies": "out/energies.npy"}, metrics)


if __name__ == "__main__":
    main()
