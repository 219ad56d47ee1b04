#!/usr/bin/env python3
"""Writes the seed inputs of the npy, result_json and external_reply fuzz targets.

Run from fuzz/: python3 make_seeds.py (numpy only). The npy seeds are written by
numpy itself, so that the corpus starts from what real workers produce; the frames
follow the framing table in crates/physics/src/external.rs.
"""
import json
import struct

import numpy as np

C = "corpus"

# .npy files as numpy writes them: every element type tarn reads, both orders, and
# the 2.0 header format.
np.save(f"{C}/npy/f8_3x2.npy", np.arange(6, dtype="<f8").reshape(3, 2))
np.save(f"{C}/npy/f4_vec.npy", np.array([1.5, -2.0, np.nan], dtype="<f4"))
np.save(f"{C}/npy/i8_labels.npy", np.array([-1, 0, 2, 1], dtype="<i8"))
np.save(f"{C}/npy/i4_rank3.npy", np.arange(8, dtype="<i4").reshape(2, 2, 2))
np.save(f"{C}/npy/bool_keep.npy", np.array([True, False, True]))
np.save(f"{C}/npy/f8_fortran.npy", np.asfortranarray(np.arange(6.0).reshape(2, 3)))
np.save(f"{C}/npy/empty_0x2.npy", np.zeros((0, 2)))
with open(f"{C}/npy/v2_header.npy", "wb") as f:
    np.lib.format.write_array(f, np.ones((2, 2)), version=(2, 0))

# result.json files naming the arrays the fuzz target writes into its task directory.
explore = {
    "protocol": 1,
    "status": "ok",
    "outputs": {"samples": "out/samples.npy", "energies": "out/energies.npy",
                "cv": "out/cv.npy"},
    "metrics": {"acceptance": 0.31, "unset": None},
    "energy_evals": 20000,
    "model": None,
}
dedup = {
    "protocol": 1,
    "status": "ok",
    "outputs": {"labels": "out/labels.npy", "new_states": "out/new_states.npy",
                "new_energies": "out/new_energies.npy"},
    "metrics": {},
    "energy_evals": 7,
}
retrain = {"protocol": 1, "status": "ok", "energy_evals": 1, "model": "out/model.safetensors"}
failed = {"protocol": 1, "status": "failed", "message": "out of ideas", "energy_evals": 0}
for name, doc in [("explore", explore), ("dedup", dedup), ("retrain", retrain),
                  ("failed", failed)]:
    with open(f"{C}/result_json/{name}.json", "w") as f:
        json.dump(doc, f, indent=1)

# External-model frames: replies to the target's fixed request (n = 3, dim = 2), and
# a request frame.
def reply(energies, forces=None):
    b = b"TRNR" + struct.pack("<IQ", 0, len(energies)) + struct.pack(f"<{len(energies)}d", *energies)
    if forces is not None:
        b += struct.pack(f"<{len(forces)}d", *forces)
    return b

with open(f"{C}/external_reply/reply_forces.bin", "wb") as f:
    f.write(reply([1.0, 2.0, -3.0], [0.1, 0.2, 0.3, 0.4, 0.5, 0.6]) * 2)
with open(f"{C}/external_reply/reply_energies.bin", "wb") as f:
    f.write(reply([1.0, float("inf"), -3.0]))
with open(f"{C}/external_reply/reply_failure.bin", "wb") as f:
    msg = "dimension 2 is not what I expected".encode()
    f.write(b"TRNR" + struct.pack("<IQ", 7, len(msg)) + msg)
with open(f"{C}/external_reply/request.bin", "wb") as f:
    x = [0.5, -1.0, 2.0, 3.0]
    f.write(b"TRNQ" + struct.pack("<IQQB", 1, 2, 2, 1) + struct.pack("<4d", *x))
