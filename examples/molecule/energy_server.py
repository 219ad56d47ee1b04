#!/usr/bin/env python3
"""An external energy model for tarn: a molecule under an OpenMM force field, served over
stdin/stdout in tarn's framing (version 1; the module doc of
crates/physics/src/external.rs is the specification):

  request : b"TRNQ", u32 version=1, u64 n, u64 dim, u8 want_forces, n*dim f64
  reply   : b"TRNR", u32 status=0, u64 n, n f64 energies, [n*dim f64 forces]
  failure : b"TRNR", u32 status!=0, u64 L, L bytes of UTF-8 message

All little-endian. Units (see peptide.py): positions in angstrom, energies in kJ/mol,
forces in kJ/mol/A (minus the gradient). Nothing but replies goes to stdout; the program
exits 0 when tarn closes its stdin.

    python3 energy_server.py MOLECULE.pdb [--timing FILE]

With --timing, the program writes to FILE at exit a JSON object with the number of
configurations it evaluated and the seconds spent inside OpenMM (setting positions and
computing energies and forces), in all and per request, and its own CPU seconds outside
OpenMM; the first request (a warm-up) is left out. So the
cost of the pipe can be measured in the same run as the difference to the caller's wall
time (tests/molecule.rs, `pipe_throughput_against_openmm_in_the_same_run`).

The PDB gives the topology only (atom order = coordinate order); the force field is
amber14-all.xml in vacuum with no cutoff and no constraints, on the Reference platform.
"""
import fcntl
import json
import struct
import sys
import time

import numpy as np

import peptide

REQUEST = struct.Struct("<4sIQQB")
REPLY = struct.Struct("<4sIQ")


def read_into(stream, view):
    """Fills the memoryview from the stream; returns the number of bytes read (less than
    len(view) only at the end of the stream)."""
    done = 0
    while done < len(view):
        k = stream.readinto(view[done:])
        if not k:
            break
        done += k
    return done


def fail(out, status, message):
    """A failure reply that tarn shows to the user."""
    data = message.encode()
    out.write(REPLY.pack(b"TRNR", status, len(data)) + data)
    out.flush()


class Evaluator:
    """Batched energies and forces of one molecule on one OpenMM context."""

    def __init__(self, pdb_path, timed=False):
        topology = peptide.load_topology(pdb_path)
        self.timed = timed
        self.dim = 3 * topology.getNumAtoms()
        self.context = peptide.reference_context(peptide.create_system(topology))
        self.requests = 0
        self.evals = 0
        self.seconds = 0.0
        self.cpu_seconds = 0.0
        self.request_seconds = []

    def evaluate(self, x, energies, forces):
        """Writes energies [n] in kJ/mol and, when `forces` is not None, forces [n, dim]
        in kJ/mol/A into the given arrays (views of the reply buffer)."""
        if self.timed:
            start, cpu_start = time.perf_counter(), time.process_time()
        n = x.shape[0]
        for i in range(n):
            if forces is None:
                energies[i] = peptide.energy_only(self.context, x[i])
            else:
                energies[i], forces[i] = peptide.energy_and_forces(self.context, x[i])
        if not self.timed:
            return
        self.requests += 1
        if self.requests > 1:
            self.evals += n
            self.request_seconds.append(time.perf_counter() - start)
            self.seconds += self.request_seconds[-1]
            self.cpu_seconds += time.process_time() - cpu_start


def widen_pipes(size=1 << 20):
    """Grows the stdin and stdout pipes (Linux, F_SETPIPE_SZ) so that a whole batch
    request or reply passes in one write instead of 64 kB pieces, each of which would
    wait for the other process to be scheduled. Not a pipe (or not Linux): left alone."""
    for fd in (0, 1):
        try:
            fcntl.fcntl(fd, getattr(fcntl, "F_SETPIPE_SZ", 1031), size)
        except OSError:
            pass


def serve(evaluator, inp, out):
    """Answers requests until the input closes; returns the exit status. The request
    and reply buffers are reused between requests, and the reply is one write."""
    header = bytearray(REQUEST.size)
    header_view = memoryview(header)
    payload = bytearray()
    reply = bytearray()
    views = {}  # (n, want_forces) -> (x, energies, forces, reply size): numpy views
    while True:
        got = read_into(inp, header_view)
        if got == 0:
            return 0
        if got < REQUEST.size:
            print("energy_server.py: truncated request header", file=sys.stderr)
            return 1
        magic, version, n, dim, want_forces = REQUEST.unpack(header)
        if magic != b"TRNQ" or version != 1:
            fail(out, 1, f"bad request magic {magic!r} or version {version}")
            return 1
        size = 8 * n * dim
        if len(payload) < size:
            payload = bytearray(size)
            views.clear()
        if read_into(inp, memoryview(payload)[:size]) < size:
            print("energy_server.py: truncated request payload", file=sys.stderr)
            return 1
        if dim != evaluator.dim:
            fail(out, 2, f"the molecule has {evaluator.dim} coordinates, the request {dim}")
            continue
        key = (n, want_forces)
        if key not in views:
            reply_size = REPLY.size + 8 * n + (8 * n * dim if want_forces else 0)
            if len(reply) < reply_size:
                reply = bytearray(reply_size)
                views.clear()
            x = np.frombuffer(payload, dtype="<f8", count=n * dim).reshape(n, dim)
            energies = np.frombuffer(reply, dtype="<f8", count=n, offset=REPLY.size)
            forces = np.frombuffer(reply, dtype="<f8", count=n * dim,
                                   offset=REPLY.size + 8 * n).reshape(n, dim) if want_forces else None
            views[key] = (x, energies, forces, memoryview(reply)[:reply_size])
        x, energies, forces, reply_view = views[key]
        try:
            evaluator.evaluate(x, energies, forces)
        except Exception as e:  # an OpenMM error becomes a failure reply, not a crash
            fail(out, 3, f"OpenMM: {e}")
            continue
        REPLY.pack_into(reply, 0, b"TRNR", 0, n)
        out.write(reply_view)
        out.flush()


def main():
    args = sys.argv[1:]
    timing = None
    if len(args) == 3 and args[1] == "--timing":
        timing = args.pop(2)
        args.pop(1)
    if len(args) != 1:
        print("usage: energy_server.py MOLECULE.pdb [--timing FILE]", file=sys.stderr)
        return 2
    evaluator = Evaluator(args[0], timed=timing is not None)
    widen_pipes()
    cpu_start = time.process_time()
    status = serve(evaluator, sys.stdin.buffer, sys.stdout.buffer)
    if timing:
        # The server's own CPU time outside OpenMM is its share of the pipe's cost
        # (reading, decoding, encoding, writing); the rest is waiting to be scheduled.
        framing_cpu = time.process_time() - cpu_start - evaluator.cpu_seconds
        with open(timing, "w") as f:
            json.dump({"evals": evaluator.evals, "seconds": evaluator.seconds,
                       "framing_cpu_seconds": framing_cpu,
                       "request_seconds": evaluator.request_seconds}, f)
    return status


if __name__ == "__main__":
    sys.exit(main())
