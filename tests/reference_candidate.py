"""Tiny candidate implementations used by tests/test_reference.py.

``loaded_smi(case)`` is an independent textbook loaded SMI (Reed, Mallett & Brennan 1974;
Carlson 1988): ``R = (1/c) sum x x^H + delta I``, ``w = R^-1 a / (a^H R^-1 a)``.
Run as a program (``python reference_candidate.py MODE CASE_DIR OUT [PIDFILE]``) it is a
command-mode candidate: MODE ``good`` writes the weights, ``mixed`` is good for case-0000,
crashes for case-0001 and hangs for case-0002, ``nofile`` writes nothing.
"""
import json
import os
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np


def loaded_smi(case, window_offset=0, conjugate=False, loading=True):
    x = np.asarray(case.samples)
    a = np.asarray(case.steering)
    if conjugate:
        a = np.conj(a)
    db = case.params.get("loading_db")
    delta = case.noise_power * 10.0 ** (db / 10.0) if (loading and db is not None) else 0.0
    out = []
    for c in np.asarray(case.checkpoints):
        k = int(c) - window_offset
        r = x[:k].T @ np.conj(x[:k]) / k + delta * np.eye(len(a))
        w = np.linalg.solve(r, a)
        out.append(w / np.conj(np.vdot(w, a)))
    return np.array(out)


def read_case(folder):
    folder = Path(folder)
    info = json.loads((folder / "case.json").read_text())
    ref = folder / "reference.npy"
    return SimpleNamespace(
        samples=np.load(folder / "samples.npy", allow_pickle=False),
        steering=np.load(folder / "steering.npy", allow_pickle=False),
        reference=np.load(ref, allow_pickle=False) if ref.exists() else None,
        checkpoints=np.load(folder / "checkpoints.npy", allow_pickle=False),
        noise_power=info["noise_power"], params=info["params"], name=folder.name)


def main(argv):
    mode, folder, out = argv[:3]
    case = read_case(folder)
    if mode == "mixed" and case.name.endswith("1"):
        raise RuntimeError("deliberate crash in the candidate")
    if mode == "mixed" and case.name.endswith("2"):
        Path(argv[3]).write_text(str(os.getpid()))
        time.sleep(60)
    if mode == "nofile":
        return 0
    np.save(out, loaded_smi(case), allow_pickle=False)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
