"""Fits the degree-5 polynomial for 2^f on [-1/2, 1/2] used by the fused kernel's lane
exponential (crates/flow/src/fused.rs, `simd::exp2`).

p(f) = 1 + c1 f + c2 f^2 + ... + c5 f^5, with the constant term held at 1 (so that
2^0 = 1 exactly), fitted for relative error by Lawson-weighted least squares on
Chebyshev nodes (which converges to the minimax fit), then rounded to float32 and
checked in float32 with fused multiply-adds emulated in float64.

Run: python3 crates/flow/tools/fit_exp2.py  (numpy, any recent version; run with
numpy 2.4.6 to produce the committed coefficients). Prints the coefficients and the
worst relative error: about 9.1e-8 in float64, 1.7e-7 evaluated in float32.
"""
import numpy as np

HALF = 0.5
x = np.cos(np.linspace(0.0, np.pi, 4001)) * HALF
x = x[np.abs(x) > 1e-9]
basis = np.vander(x, 5, increasing=True) * x[:, None]  # f, f^2, ..., f^5
target = np.exp2(x) - 1.0
relative = 1.0 / np.exp2(x)
lawson = np.ones_like(x)
for _ in range(60):
    w = np.sqrt(lawson) * relative
    c = np.linalg.lstsq(basis * w[:, None], target * w, rcond=None)[0]
    err = (1.0 + basis @ c - np.exp2(x)) / np.exp2(x)
    lawson = lawson * np.abs(err)
    lawson /= lawson.sum()
print("worst relative error (float64):", np.abs(err).max())

c32 = c.astype(np.float32)
f = np.linspace(-HALF, HALF, 400001).astype(np.float32)
p = np.float32(c32[4])
for k in (3, 2, 1, 0):
    p = (p.astype(np.float64) * f + c32[k]).astype(np.float32)  # one FMA, one rounding
p = (p.astype(np.float64) * f + 1.0).astype(np.float32)
exact = np.exp2(f.astype(np.float64))
print("worst relative error (float32):", np.abs((p - exact) / exact).max())
print("c1..c5 =", [repr(float(v)) for v in c32])
