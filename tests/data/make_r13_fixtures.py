"""Writes tests/data/r13_fixtures.json: the reference poles and frequency response of the
chosen 4th-order discrete plant of R13 (subspace identification; docs/references.md),
computed by SciPy's `scipy.signal`, a general-purpose reference library.

The Rust test (tests/identify.rs) reads the JSON: it simulates the plant from the matrices
recorded here, identifies it with `identify::subspace::subspace`, and compares the fitted
model's poles and frequency response with the values below. CI needs no Python: the JSON is
committed beside this script, with the SciPy and NumPy versions that made it.

Run with the pinned versions in a virtual environment (python3-venv on Debian):
    python3 -m venv target/scipy-venv
    target/scipy-venv/bin/pip install scipy==1.17.1 numpy==2.3.5
    target/scipy-venv/bin/python tests/data/make_r13_fixtures.py

The plant (our own choice): two lightly damped modes, poles 0.85 e^{±0.35i} and
0.6 e^{±1.2i}, in a basis scrambled by a fixed invertible T; 2 inputs, 2 outputs, a
non-zero feedthrough D. The step is dt = 1 s, so frequencies are in rad/sample and rad/s
alike (z = e^{iω}).
"""
import json
import pathlib

import numpy as np
import warnings

import scipy
from scipy import signal

# ss2tf leaves leading zeros in the numerators of the channels with D = 0; harmless.
warnings.simplefilter("ignore", signal.BadCoefficients)


def block(r, theta):
    c, s = r * np.cos(theta), r * np.sin(theta)
    return np.array([[c, -s], [s, c]])


modal = np.zeros((4, 4))
modal[:2, :2] = block(0.85, 0.35)
modal[2:, 2:] = block(0.6, 1.2)
T = np.array([[1.0, 0.4, -0.3, 0.2],
              [0.1, 1.0, 0.5, -0.2],
              [0.3, -0.2, 1.0, 0.4],
              [-0.1, 0.2, 0.3, 1.0]])
A = T @ modal @ np.linalg.inv(T)
B = np.array([[1.0, 0.0], [0.5, -0.4], [0.0, 1.0], [0.3, 0.6]])
C = np.array([[1.0, 0.2, 0.0, -0.5], [0.0, 0.7, 1.0, 0.3]])
D = np.array([[0.1, 0.0], [0.0, -0.2]])
dt = 1.0

# Poles of the channel from input 1 to output 1 (every mode reaches it), by
# scipy.signal.ss2zpk; the denominators of all four channels are the same polynomial.
_, poles, _ = signal.ss2zpk(A, B, C[:1], D[:1], input=0)
poles = sorted(poles, key=lambda p: (-abs(p), -p.imag))

w = np.array([0.01, 0.1, 0.3, 0.35, 0.6, 1.0, 1.2, 1.5, 2.0, 3.0])
response = []  # response[o][i] = list of [re, im] at each w
for o in range(2):
    row = []
    for i in range(2):
        num, den = signal.ss2tf(A, B, C, D, input=i)
        _, h = signal.dfreqresp(signal.dlti(num[o], den, dt=dt), w=w)
        row.append([[float(v.real), float(v.imag)] for v in h])
    response.append(row)

# The fixture proves itself: the transfer-function route agrees with C (zI - A)^-1 B + D.
for k, wk in enumerate(w):
    z = np.exp(1j * wk * dt)
    G = C @ np.linalg.solve(z * np.eye(4) - A, B) + D
    for o in range(2):
        for i in range(2):
            assert abs(complex(*response[o][i][k]) - G[o, i]) < 1e-9, (o, i, wk)

out = {
    "source": "scipy.signal (ss2zpk poles, ss2tf + dfreqresp response); made by "
              "tests/data/make_r13_fixtures.py",
    "scipy_version": scipy.__version__,
    "numpy_version": np.__version__,
    "dt": dt,
    "A": A.tolist(), "B": B.tolist(), "C": C.tolist(), "D": D.tolist(),
    "poles": [[float(p.real), float(p.imag)] for p in poles],
    "frequencies": w.tolist(),
    "response": response,
}
path = pathlib.Path(__file__).with_name("r13_fixtures.json")
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path} (scipy {scipy.__version__})")
