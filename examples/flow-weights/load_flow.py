#!/usr/bin/env python3
"""Load a tarn flow weight file with numpy alone and evaluate log q(x).

Both flow families are read: RealNVP files (metadata "format" = "tarn-flow", this
module's TarnFlow) and layer-stack files ("format" = "tarn-flow-stack", StackFlow of
load_stack.py next to this file); `load(path)` picks the reader by the "format" key.

A tarn flow file is a safetensors file: 8 bytes (little-endian u64, the header length),
a JSON header (tensor name -> dtype, shape, data_offsets; plus "__metadata__"), then the
raw little-endian tensor data. The metadata key "architecture" holds the flow's
architecture as JSON; "convention" states the formulas. This script rebuilds the flow
from that alone, in float64.

Usage:  python3 load_flow.py FLOW.safetensors POINTS.(csv|npy) [TEMPERATURE_FACTOR]
POINTS holds one configuration per row (data_dim columns). Prints log q(x) per row.
"""
import json
import struct
import sys

import numpy as np

DTYPES = {"F32": np.float32, "F64": np.float64, "I64": np.int64}


def read_safetensors(path):
    """Return (metadata dict, {name: numpy array}) of a safetensors file."""
    with open(path, "rb") as f:
        buf = f.read()
    (n,) = struct.unpack("<Q", buf[:8])
    header = json.loads(buf[8:8 + n])
    meta = header.pop("__metadata__", {})
    base = 8 + n
    tensors = {}
    for name, info in header.items():
        start, end = info["data_offsets"]
        arr = np.frombuffer(buf[base + start:base + end], dtype=DTYPES[info["dtype"]])
        tensors[name] = arr.reshape(info["shape"])
    return meta, tensors


def read_format(path):
    """The "format" metadata value of a safetensors file (reads the header only)."""
    with open(path, "rb") as f:
        (n,) = struct.unpack("<Q", f.read(8))
        header = json.loads(f.read(n))
    return header.get("__metadata__", {}).get("format")


def load(path):
    """The flow in `path`, read by the reader its "format" names; both have log_prob(x, tau)."""
    fmt = read_format(path)
    if fmt == "tarn-flow":
        return TarnFlow(path)
    if fmt == "tarn-flow-stack":
        from load_stack import StackFlow

        return StackFlow(path)
    raise ValueError(f"unknown format {fmt!r} (this reader knows tarn-flow and tarn-flow-stack)")


def helmert(n):
    """Orthonormal basis (n x (n-1)) of the zero-sum subspace: e_k = (1,..,1,-k,0,..)/sqrt(k(k+1))."""
    e = np.zeros((n, n - 1))
    for k in range(1, n):
        e[:k, k - 1] = 1.0
        e[k, k - 1] = -k
        e[:, k - 1] /= np.sqrt(k * (k + 1.0))
    return e


ACTIVATIONS = {
    "silu": lambda v: v / (1.0 + np.exp(-v)),
    "tanh": np.tanh,
    "relu": lambda v: np.maximum(v, 0.0),
}


class TarnFlow:
    """The inverse direction (x -> z) of a tarn RealNVP flow and its log-density."""

    def __init__(self, path):
        meta, self.t = read_safetensors(path)
        if meta.get("format") != "tarn-flow" or meta.get("format_version") != "1":
            raise ValueError("not a tarn-flow version 1 file")
        self.arch = json.loads(meta["architecture"])
        self.act = ACTIVATIONS[self.arch["activation"]]
        frame = self.arch["frame"]
        self.frame = None
        if frame["kind"] == "centre_of_mass":
            self.frame = (frame["n_particles"], frame["spatial_dim"])

    def to_model(self, x):
        if self.frame is None:
            return x.copy()
        n, d = self.frame
        xs = x.reshape(len(x), n, d)
        return np.einsum("ik,rid->rkd", helmert(n), xs).reshape(len(x), (n - 1) * d)

    def mlp(self, k, a):
        h = a
        n_dense = self.arch["hidden_layers"] + 1
        for l in range(n_dense):
            w = self.t[f"coupling.{k}.dense.{l}.weight"].astype(np.float64)
            b = self.t[f"coupling.{k}.dense.{l}.bias"].astype(np.float64)
            h = h @ w + b
            if l + 1 < n_dense:
                h = self.act(h)
        return h

    def log_prob(self, x, tau=1.0):
        x = np.asarray(x, dtype=np.float64)
        w = self.to_model(x)
        dim = w.shape[1]
        log_det = np.zeros(len(x))
        if self.arch["whiten"]:
            mean = self.t["whitening.mean"].astype(np.float64)
            chol = self.t["whitening.chol"].astype(np.float64)
            w = np.linalg.solve(chol, (w - mean).T).T
            log_det -= np.log(np.diag(chol)).sum()
        c = self.arch["clamp"]
        for k in reversed(range(self.arch["n_layers"])):
            cond = self.t[f"coupling.{k}.cond_index"]
            trans = self.t[f"coupling.{k}.trans_index"]
            out = self.mlp(k, w[:, cond])
            nb = len(trans)
            s = c * np.tanh(out[:, :nb] / c)
            w[:, trans] = (w[:, trans] - out[:, nb:]) * np.exp(-s)
            log_det -= s.sum(axis=1)
        z2 = (w * w).sum(axis=1)
        return -0.5 * z2 / tau - 0.5 * dim * np.log(2 * np.pi * tau) + log_det


def main():
    if len(sys.argv) < 3:
        sys.exit(__doc__)
    flow = load(sys.argv[1])
    pts = np.load(sys.argv[2]) if sys.argv[2].endswith(".npy") else np.loadtxt(sys.argv[2], delimiter=",", ndmin=2)
    tau = float(sys.argv[3]) if len(sys.argv) > 3 else 1.0
    for v in flow.log_prob(pts, tau):
        print(repr(float(v)))


if __name__ == "__main__":
    main()
