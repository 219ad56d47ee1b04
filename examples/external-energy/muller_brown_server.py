#!/usr/bin/env python3
"""An external energy model for tarn: the Muller-Brown surface, served over stdin/stdout.

tarn starts this program once and sends it batched requests; it answers each with the
energies (and, when asked, the forces) of every configuration. Needs only numpy.

Framing (version 1; all integers unsigned little-endian, reals float64 little-endian):
  request : b"TRNQ", u32 version=1, u64 n, u64 dim, u8 want_forces, n*dim f64
  reply   : b"TRNR", u32 status=0, u64 n, n f64 energies, [n*dim f64 forces]
  failure : b"TRNR", u32 status!=0, u64 L, L bytes of UTF-8 message
Forces are minus the gradient. Write nothing else to stdout (use stderr for logs).
When stdin closes, exit 0.

Muller & Brown, Theor. Chim. Acta 53, 75 (1979):
  V(x, y) = sum_k A_k exp[a_k (x-x0_k)^2 + b_k (x-x0_k)(y-y0_k) + c_k (y-y0_k)^2]
"""
import struct
import sys

import numpy as np

A = np.array([-200.0, -100.0, -170.0, 15.0])
a = np.array([-1.0, -1.0, -6.5, 0.7])
b = np.array([0.0, 0.0, 11.0, 0.6])
c = np.array([-10.0, -10.0, -6.5, 0.7])
X0 = np.array([1.0, 0.0, -0.5, -1.0])
Y0 = np.array([0.0, 0.5, 1.5, 1.0])

REQUEST = struct.Struct("<4sIQQB")
REPLY = struct.Struct("<4sIQ")
DIM = 2


def muller_brown(x):
    """Energies [n] and forces [n, 2] of configurations x [n, 2]."""
    dx = x[:, 0:1] - X0
    dy = x[:, 1:2] - Y0
    t = A * np.exp(a * dx * dx + b * dx * dy + c * dy * dy)
    energy = t.sum(axis=1)
    gx = (t * (2.0 * a * dx + b * dy)).sum(axis=1)
    gy = (t * (b * dx + 2.0 * c * dy)).sum(axis=1)
    return energy, -np.stack([gx, gy], axis=1)


def read_exact(stream, size):
    """Exactly size bytes, or fewer only at the end of the stream."""
    chunks = []
    while size > 0:
        chunk = stream.read(size)
        if not chunk:
            break
        chunks.append(chunk)
        size -= len(chunk)
    return b"".join(chunks)


def fail(out, status, message):
    data = message.encode()
    out.write(REPLY.pack(b"TRNR", status, len(data)) + data)
    out.flush()


def main():
    inp = sys.stdin.buffer
    out = sys.stdout.buffer
    while True:
        header = read_exact(inp, REQUEST.size)
        if not header:
            return 0
        if len(header) < REQUEST.size:
            print("external_energy.py: truncated request header", file=sys.stderr)
            return 1
        magic, version, n, dim, want_forces = REQUEST.unpack(header)
        if magic != b"TRNQ" or version != 1:
            fail(out, 1, f"bad request magic {magic!r} or version {version}")
            return 1
        payload = read_exact(inp, 8 * n * dim)
        if len(payload) < 8 * n * dim:
            print("external_energy.py: truncated request payload", file=sys.stderr)
            return 1
        if dim != DIM:
            fail(out, 2, f"Muller-Brown has dim 2, the request has dim {dim}")
            continue
        x = np.frombuffer(payload, dtype="<f8").reshape(n, dim)
        energy, forces = muller_brown(x)
        parts = [REPLY.pack(b"TRNR", 0, n), energy.astype("<f8").tobytes()]
        if want_forces:
            parts.append(forces.astype("<f8").tobytes())
        out.write(b"".join(parts))
        out.flush()


if __name__ == "__main__":
    sys.exit(main())
