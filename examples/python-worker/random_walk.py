#!/usr/bin/env python3
"""A user-written explore worker for tarn, in Python with numpy only.

It runs Metropolis Monte Carlo on the Müller–Brown surface (Müller & Brown, Theor.
Chim. Acta 53, 75, 1979) and hands its samples back through tarn's worker protocol,
version 1 (see DEVELOPERS.md, "Worker protocol"):

  1. read the task file named by $TARN_TASK (the working directory is the task dir);
  2. read the input arrays it lists (here: `start`, an [m, 2] float64 .npy array);
  3. write the output arrays under out/ and then out/result.json;
  4. exit 0.

Use it from a campaign file as

    [[explore]]
    name = "walk"
    command = ["python3", "examples/python-worker/random_walk.py"]
    walkers = 3
    [explore.params]
    n_steps = 2000
    step = 0.05
    stride = 20

Everything random comes from the task's seed, so a retried or resumed task gives the
same samples.
"""
import json
import os
import sys

import numpy as np

A = np.array([-200.0, -100.0, -170.0, 15.0])
a = np.array([-1.0, -1.0, -6.5, 0.7])
b = np.array([0.0, 0.0, 11.0, 0.6])
c = np.array([-10.0, -10.0, -6.5, 0.7])
X0 = np.array([1.0, 0.0, -0.5, -1.0])
Y0 = np.array([0.0, 0.5, 1.5, 1.0])


def muller_brown(p):
    """Energy of one point p = (x, y)."""
    dx = p[0] - X0
    dy = p[1] - Y0
    return float(np.sum(A * np.exp(a * dx * dx + b * dx * dy + c * dy * dy)))


def main():
    task_path = os.environ["TARN_TASK"]
    with open(task_path) as f:
        task = json.load(f)
    if task["protocol"] != 1:
        sys.exit(f"protocol {task['protocol']} is not supported by this worker")
    params = task.get("params") or {}
    n_steps = int(params.get("n_steps", 2000))
    step = float(params.get("step", 0.05))
    stride = int(params.get("stride", 20))
    kT = float(task["kT"]) * float(params.get("temperature_factor", 1.0))

    start = np.load(task["inputs"]["start"])
    rng = np.random.default_rng(task["seed"])
    x = start[0].astype(np.float64).copy()
    e = muller_brown(x)
    evals = 1
    accepted = 0
    samples, energies = [], []
    for i in range(1, n_steps + 1):
        trial = x + step * rng.standard_normal(2)
        e_trial = muller_brown(trial)
        evals += 1
        if e_trial <= e or rng.random() < np.exp(-(e_trial - e) / kT):
            x, e = trial, e_trial
            accepted += 1
        if i % stride == 0:
            samples.append(x.copy())
            energies.append(e)

    os.makedirs("out", exist_ok=True)
    np.save("out/samples.npy", np.array(samples, dtype=np.float64).reshape(-1, 2))
    np.save("out/energies.npy", np.array(energies, dtype=np.float64))
    result = {
        "protocol": 1,
        "status": "ok",
        "outputs": {"samples": "out/samples.npy", "energies": "out/energies.npy"},
        "metrics": {"acceptance": accepted / n_steps},
        "energy_evals": evals,
        "model": None,
    }
    # Write the result file last, through a temporary name, so that a worker killed
    # midway never leaves a result that looks complete.
    with open("out/result.json.tmp", "w") as f:
        json.dump(result, f)
    os.replace("out/result.json.tmp", "out/result.json")


if __name__ == "__main__":
    main()
