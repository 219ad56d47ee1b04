#!/usr/bin/env python3
"""Load a tarn layer-stack weight file (format "tarn-flow-stack") with numpy alone and
evaluate log q(x).

The file is safetensors (see load_flow.py). Its metadata key "architecture" holds the
stack's spec as JSON: data_dim, lattice_side, permutation_seed and the list "layers",
each entry being `repeat` consecutive coupling layers of one kind ("coupling": dense
conditioner; "checkerboard": periodic convolutional conditioner on an L x L lattice)
with one element-wise map ("affine" or "spline"). Layer k of the expanded list has the
tensors

    layer.{k}.cond_index, layer.{k}.trans_index   (I64) coordinates A and B
    layer.{k}.net.{l}.weight [n_in * patch, n_out], layer.{k}.net.{l}.bias [n_out]

The flow maps latent z to data x, layer 0 first; log q(x) at temperature factor tau is
log N(z; 0, tau I) + log|det dz/dx|, computed here by running the layers backwards
(last first): x_A is unchanged by a layer, so its conditioner sees the same input in
either direction, and x_B = g^-1(x_B; theta(x_A)).

Usage:  python3 load_stack.py FLOW.safetensors POINTS.(csv|npy) [TEMPERATURE_FACTOR]
(load_flow.py does the same, choosing the reader by the file's "format").
"""
import json
import sys

import numpy as np

from load_flow import ACTIVATIONS, read_safetensors

FORMAT = "tarn-flow-stack"
VERSION = "1"

# Spline constants (crates/flow/src/spline.rs).
MIN_BIN = 1e-3
MIN_SLOPE = 1e-3
SLOPE_SHIFT = np.log(np.expm1(1.0 - MIN_SLOPE))

# Defaults of an entry of "layers" (a file written by tarn states every key).
LAYER_DEFAULTS = {
    "transform": "affine",
    "repeat": 1,
    "kernel": 3,
    "activation": "silu",
    "clamp": 3.0,
    "bins": 8,
    "bound": 4.0,
}


def softplus(v):
    """ln(1 + e^v) without overflow."""
    return np.maximum(v, 0.0) + np.log1p(np.exp(-np.abs(v)))


def softmax(v):
    """Softmax over the last axis."""
    e = np.exp(v - v.max(axis=-1, keepdims=True))
    return e / e.sum(axis=-1, keepdims=True)


def spline_knots(raw, bins, bound):
    """Knots [-B, ..., B] (last axis K + 1) from K raw sizes:
    size_j = 2B (MIN_BIN + (1 - K MIN_BIN) softmax(raw)_j), the last knot exactly B."""
    p = softmax(raw)
    sizes = 2.0 * bound * MIN_BIN + 2.0 * bound * (1.0 - bins * MIN_BIN) * p
    knots = np.empty(raw.shape[:-1] + (bins + 1,))
    knots[..., 0] = -bound
    knots[..., 1:] = -bound + np.cumsum(sizes, axis=-1)
    knots[..., bins] = bound
    return knots


def spline_slopes(raw_slopes):
    """Knot slopes delta_0..delta_K of the interval spline: the K - 1 interior ones
    MIN_SLOPE + softplus(r + c) (r = 0 gives 1), the two boundary ones fixed at 1."""
    n = raw_slopes.shape[0]
    ones = np.ones((n, 1))
    inner = MIN_SLOPE + softplus(raw_slopes + SLOPE_SHIFT)
    return np.concatenate([ones, inner, ones], axis=1)


def spline_inverse(theta, y, bins, bound):
    """x = g^-1(y) and ln dx/dy of the interval rational-quadratic spline, element-wise.

    theta: [n, 3K - 1] (K raw widths, K raw heights, K - 1 raw interior slopes); y: [n].
    Identity outside [-B, B]. Inside, in the bin k holding y, with v = (y - y_k)/h_k,
    s = h_k/w_k, D = delta_{k+1} + delta_k - 2s, xi solves a xi^2 + b xi + c = 0 for
    a = s - delta_k + v D, b = delta_k - v D, c = -s v, by the stable root
    xi = -2c / (b + sqrt(b^2 - 4ac)); x = x_k + xi w_k and ln dx/dy = -ln dy/dx(xi).
    """
    k = bins
    x = y.copy()
    ld = np.zeros_like(y)
    inside = (y >= -bound) & (y <= bound)
    if not inside.any():
        return x, ld
    th, yi = theta[inside], y[inside]
    rows = np.arange(len(yi))
    xs = spline_knots(th[:, :k], k, bound)
    ys = spline_knots(th[:, k:2 * k], k, bound)
    deltas = spline_slopes(th[:, 2 * k:3 * k - 1])
    # Bin: the number of interior knots at or below y (the last bin holds y = B).
    b_ = (ys[:, 1:k] <= yi[:, None]).sum(axis=1)
    x0, x1 = xs[rows, b_], xs[rows, b_ + 1]
    y0, y1 = ys[rows, b_], ys[rows, b_ + 1]
    d0, d1 = deltas[rows, b_], deltas[rows, b_ + 1]
    w, h = x1 - x0, y1 - y0
    s = h / w
    dsum = d1 + d0 - 2.0 * s
    v = np.clip((yi - y0) / h, 0.0, 1.0)
    qa = s - d0 + v * dsum
    qb = d0 - v * dsum
    qc = -s * v
    disc = np.maximum(qb * qb - 4.0 * qa * qc, 0.0)
    denom = np.maximum(qb + np.sqrt(disc), np.finfo(np.float64).tiny)
    xi = np.clip(-2.0 * qc / denom, 0.0, 1.0)
    om = 1.0 - xi
    t = xi * om
    den = s + dsum * t
    dn = d1 * xi * xi + 2.0 * s * t + d0 * om * om
    ld_fwd = 2.0 * np.log(s) + np.log(dn) - 2.0 * np.log(den)
    x[inside] = x0 + xi * w
    ld[inside] = -ld_fwd
    return x, ld


def affine_inverse(theta, y, clamp):
    """x = (y - t) e^-s with s = clamp tanh(raw / clamp), (raw, t) = theta; ln dx/dy = -s."""
    s = clamp * np.tanh(theta[:, 0] / clamp)
    return (y - theta[:, 1]) * np.exp(-s), -s


def neighbour_table(side, kernel):
    """For every site (row-major) of a side x side periodic lattice, its kernel x kernel
    neighbourhood: row offsets -h..h outer, column offsets inner."""
    h = kernel // 2
    r, c = np.divmod(np.arange(side * side), side)
    off = np.arange(-h, h + 1)
    rr = (r[:, None, None] + off[None, :, None]) % side
    cc = (c[:, None, None] + off[None, None, :]) % side
    return (rr * side + cc).reshape(side * side, kernel * kernel)


def expand_layers(arch):
    """The architecture's layer entries, one per coupling layer (repeats expanded)."""
    out = []
    for i, entry in enumerate(arch["layers"]):
        spec = dict(LAYER_DEFAULTS)
        spec.update({key: val for key, val in entry.items() if val is not None})
        if spec.get("kind") not in ("coupling", "checkerboard"):
            raise ValueError(f"layers[{i}]: unknown layer kind {spec.get('kind')!r}")
        if spec["transform"] not in ("affine", "spline"):
            raise ValueError(f"layers[{i}]: unknown transform {spec['transform']!r}")
        if spec["activation"] not in ACTIVATIONS:
            raise ValueError(f"layers[{i}]: unknown activation {spec['activation']!r}")
        out.extend([spec] * spec["repeat"])
    return out


class StackFlow:
    """The inverse direction (x -> z) of a tarn layer-stack flow and its log-density."""

    def __init__(self, path):
        meta, self.t = read_safetensors(path)
        if meta.get("format") != FORMAT or meta.get("format_version") != VERSION:
            raise ValueError(f"not a {FORMAT} version {VERSION} file")
        self.arch = json.loads(meta["architecture"])
        self.dim = self.arch["data_dim"]
        self.layers = expand_layers(self.arch)
        self.nets = [self._net(k) for k in range(len(self.layers))]
        used = sum(2 + 2 * len(net) for net in self.nets)
        if used != len(self.t):
            raise ValueError(f"file has {len(self.t)} tensors, the architecture {used}")

    def _net(self, k):
        """Layer k's linear layers as float64 (weight, bias) pairs."""
        net = []
        while f"layer.{k}.net.{len(net)}.weight" in self.t:
            l = len(net)
            w = self.t[f"layer.{k}.net.{l}.weight"].astype(np.float64)
            b = self.t[f"layer.{k}.net.{l}.bias"].astype(np.float64)
            net.append((w, b))
        if not net:
            raise ValueError(f"layer.{k}: no conditioner tensors")
        return net

    def n_theta(self, spec):
        """Conditioner outputs per transformed coordinate."""
        return 2 if spec["transform"] == "affine" else 3 * spec["bins"] - 1

    def conditioner(self, k, x, cond, trans):
        """theta [n, |B|, P] of layer k from the rows x (only x[:, cond] is read)."""
        spec = self.layers[k]
        act = ACTIVATIONS[spec["activation"]]
        net = self.nets[k]
        p = self.n_theta(spec)
        n = len(x)
        if spec["kind"] == "coupling":
            h = x[:, cond]
            for l, (w, b) in enumerate(net):
                h = h @ w + b
                if l + 1 < len(net):
                    h = act(h)
            return h.reshape(n, len(trans), p)
        side, kernel = self.arch["lattice_side"], spec["kernel"]
        table = neighbour_table(side, kernel)
        # One input channel: the field on the conditioning sites, 0 elsewhere.
        h = np.zeros((n, side * side, 1))
        h[:, cond, 0] = x[:, cond]
        for l, (w, b) in enumerate(net):
            patches = h[:, table, :].reshape(n, side * side, -1)  # channels innermost
            h = patches @ w + b
            if l + 1 < len(net):
                h = act(h)
        return h[:, trans, :]

    def log_prob(self, x, tau=1.0):
        """log q(x) of each row of x ([n, data_dim]) at temperature factor tau."""
        z = np.array(x, dtype=np.float64, ndmin=2)
        if z.shape[1] != self.dim:
            raise ValueError(f"points have {z.shape[1]} columns, the flow {self.dim}")
        log_det = np.zeros(len(z))
        for k in reversed(range(len(self.layers))):
            spec = self.layers[k]
            cond = self.t[f"layer.{k}.cond_index"]
            trans = self.t[f"layer.{k}.trans_index"]
            theta = self.conditioner(k, z, cond, trans)
            nb = len(trans)
            flat = theta.reshape(len(z) * nb, -1)
            y = z[:, trans].reshape(-1)
            if spec["transform"] == "affine":
                xb, ld = affine_inverse(flat, y, spec["clamp"])
            else:
                xb, ld = spline_inverse(flat, y, spec["bins"], spec["bound"])
            z[:, trans] = xb.reshape(len(z), nb)
            log_det += ld.reshape(len(z), nb).sum(axis=1)
        z2 = (z * z).sum(axis=1)
        return -0.5 * z2 / tau - 0.5 * self.dim * np.log(2 * np.pi * tau) + log_det


def main():
    if len(sys.argv) < 3:
        sys.exit(__doc__)
    flow = StackFlow(sys.argv[1])
    pts = np.load(sys.argv[2]) if sys.argv[2].endswith(".npy") else np.loadtxt(sys.argv[2], delimiter=",", ndmin=2)
    tau = float(sys.argv[3]) if len(sys.argv) > 3 else 1.0
    for v in flow.log_prob(pts, tau):
        print(repr(float(v)))


if __name__ == "__main__":
    main()
