"""Golden values for tarn-stats' MBAR: harmonic oscillators solved by pymbar.

Run once (by hand, not by the tests) with
    python3 -m venv /tmp/pymbar-venv
    /tmp/pymbar-venv/bin/pip install pymbar==4.0.3 numpy scipy
    /tmp/pymbar-venv/bin/python crates/stats/golden/pymbar_harmonic.py

Reference library: pymbar 4.0.3 (Shirts & Chodera, J. Chem. Phys. 129, 124105, 2008),
numpy for the samples. Three one-dimensional harmonic states u_k(x) = K_k x^2 / 2
(beta = 1) with spring constants K = 1, 4, 16 and 20,000 exact samples from each
(x ~ Normal(0, 1/K_k)), drawn with numpy's default_rng(SEED). The samples are saved as
float64 .npy (pymbar_harmonic_x.npy, state by state in the order of K), and u_kn is
exactly 0.5 * K_k * x_n**2, which the Rust test rebuilds and checks against the
checksums stored here. Exact answer: Delta f_0j = 0.5 ln(K_j / K_0).
"""

import json
import pathlib

import numpy as np
import pymbar
import scipy
from pymbar import MBAR

SEED = 20_081_244
SPRING_CONSTANTS = [1.0, 4.0, 16.0]
N_PER_STATE = 20_000

here = pathlib.Path(__file__).resolve().parent
rng = np.random.default_rng(SEED)
x = np.concatenate(
    [rng.normal(0.0, 1.0 / np.sqrt(k), size=N_PER_STATE) for k in SPRING_CONSTANTS]
).astype(np.float64)
n_k = np.array([N_PER_STATE] * len(SPRING_CONSTANTS), dtype=np.int64)
u_kn = np.array([0.5 * k * x**2 for k in SPRING_CONSTANTS], dtype=np.float64)

mbar = MBAR(u_kn, n_k)
fe = mbar.compute_free_energy_differences()
ex = mbar.compute_expectations(x**2)

np.save(here / "pymbar_harmonic_x.npy", x)
out = {
    "about": "pymbar 4.0.3 MBAR on harmonic states u_k = K_k x^2 / 2; see pymbar_harmonic.py",
    "pymbar_version": pymbar.__version__,
    "numpy_version": np.__version__,
    "scipy_version": scipy.__version__,
    "seed": SEED,
    "spring_constants": SPRING_CONSTANTS,
    "n_k": n_k.tolist(),
    "samples_file": "pymbar_harmonic_x.npy",
    "u_kn_row_sums": u_kn.sum(axis=1).tolist(),
    "u_kn_row_sums_of_squares": (u_kn**2).sum(axis=1).tolist(),
    "f_k": mbar.f_k.tolist(),
    "delta_f": fe["Delta_f"].tolist(),
    "d_delta_f": fe["dDelta_f"].tolist(),
    "exact_delta_f_from_0": [0.5 * np.log(k / SPRING_CONSTANTS[0]) for k in SPRING_CONSTANTS],
    "x2_expectation_mu": ex["mu"].tolist(),
    "x2_expectation_sigma": ex["sigma"].tolist(),
}
(here / "pymbar_harmonic.json").write_text(json.dumps(out, indent=1) + "\n")
print("Delta f_0j =", fe["Delta_f"][0], "+-", fe["dDelta_f"][0])
print("<x^2>_k =", ex["mu"], "+-", ex["sigma"])
