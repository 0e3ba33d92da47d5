"""Tiny candidate implementations used by tests/test_reference.py.

``loaded_smi(case)`` is an independent textbook loaded SMI (Reed, Mallett & Brennan 1974;
Carlson 1988): ``R = (1/c) sum x x^H + delta I``, ``w = R^-1 a / (a^H R^-1 a)``;
``space_time_smi`` the same on stacked space-time snapshots and ``subband_mvdr`` the
sub-band MVDR, both written from the set's documented layout alone.
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


def stacked(x, taps):
    """Rows z_k = [x_k; x_{k-1}; ...; x_{k-L+1}] (zeros before snapshot 0), written out
    from the set's documented order (column l*N + n), independently of adapt."""
    k, n = x.shape
    z = np.zeros((k, n * taps), dtype=complex)
    for l_ in range(taps):
        z[l_:, l_ * n:(l_ + 1) * n] = x[:k - l_]
    return z


def space_time_smi(case, oldest_first=False):
    """Loaded SMI on stacked snapshots with the look vector at the centre tap (L-1)//2
    (a tapped-delay-line MVDR: Frost 1972; Compton, *Adaptive Antennas*, 1988, ch. 7):
    ``R = (1/c) sum z z^H + delta I``, ``w = R^-1 v / (v^H R^-1 v)``, ``v = e_c (x) a``.
    ``oldest_first`` returns the taps in the wrong order (a deliberate misreading)."""
    taps = int(case.params.get("taps", 1))
    n = len(case.steering)
    z = stacked(np.asarray(case.samples), taps)
    v = np.zeros(n * taps, dtype=complex)
    c0 = (taps - 1) // 2
    v[c0 * n:(c0 + 1) * n] = case.steering
    delta = case.noise_power * 10.0 ** (case.params["loading_db"] / 10.0)
    out = []
    for c in np.asarray(case.checkpoints):
        k = int(c)
        r = z[:k].T @ np.conj(z[:k]) / k + delta * np.eye(n * taps)
        w = np.linalg.solve(r, v)
        out.append(w / np.conj(np.vdot(w, v)))
    w = np.array(out)
    if oldest_first:
        w = w.reshape(len(w), taps, n)[:, ::-1].reshape(len(w), -1)
    return w


def subband_mvdr(case):
    """The sub-band MVDR written from the recipe a set carries (``weights.synthesis`` in
    case.json; adapt.studies.reference.SUBBAND_RECIPE): per-bin loaded MVDR of FFT frames
    (Van Trees 2002, broadband chapter), synthesised by frequency sampling into F taps
    per element (Oppenheim and Schafer, ch. 8)."""
    f = int(case.params["bins"])
    x = np.asarray(case.samples)
    a = np.asarray(case.steering)
    n = len(a)
    t = np.arange(f)
    win = (0.5 - 0.5 * np.cos(2 * np.pi * t / f) if case.params["window"] == "hann"
           else np.ones(f))
    nu = np.fft.fftfreq(f)
    az, el = np.radians(case.look_direction)
    u = np.array([np.sin(az) * np.cos(el), np.cos(az) * np.cos(el), np.sin(el)])
    pu = np.asarray(case.positions) @ u
    ab = a[None, :] * np.exp(2j * np.pi * pu[None, :] * nu[:, None]
                             * case.fractional_bandwidth)              # (F, N)
    db = case.params["loading_db"]
    delta = 0.0 if db is None else 10.0 ** (db / 10.0)
    frames = x[:len(x) // f * f].reshape(-1, f, n) * win[:, None]
    spec = np.fft.fft(frames, axis=1)                                  # (frames, F, N)
    c0 = f // 2
    out = []
    for c in np.asarray(case.checkpoints):
        m = int(c) // f
        wb = np.empty((f, n), dtype=complex)
        for b in range(f):
            if m == 0:
                wb[b] = ab[b] / n
                continue
            xb = spec[:m, b]                                           # (m, N)
            r = xb.T @ np.conj(xb) / m / np.sum(win ** 2) + delta * np.eye(n)
            try:
                np.linalg.cholesky(r)
                w = np.linalg.solve(r, ab[b])
            except np.linalg.LinAlgError:       # singular (m < N, unloaded): minimum norm
                w = np.linalg.pinv(r, hermitian=True) @ ab[b]
            wb[b] = w / np.conj(np.vdot(w, ab[b]))
        h = np.fft.ifft(np.conj(wb) * np.exp(-2j * np.pi * nu * c0)[:, None], axis=0)
        out.append(np.conj(h).reshape(-1))                             # column l*N + n
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
