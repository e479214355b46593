"""Writes tests/data/dare_fixtures.json: steady-state predicted covariances of linear
filters computed by SciPy's general-purpose DARE solver (R3 in docs/references.md).

For the filter, the predicted covariance P solves the dual of the control DARE:
    P = F P F' - F P H' (H P H' + R)^-1 H P F' + Q,
which is scipy.linalg.solve_discrete_are(F', H', Q, R).

Run: python3 tests/data/make_dare_fixtures.py   (needs numpy and scipy)
"""
import json
import pathlib

import numpy as np
import scipy
from scipy.linalg import solve_discrete_are

cases = []


def add(name, F, H, Q, R):
    F, H, Q, R = (np.array(m, dtype=float) for m in (F, H, Q, R))
    P = solve_discrete_are(F.T, H.T, Q, R)
    # Residual of the Riccati equation, recorded so the fixture proves itself.
    # The test reaches steady state by running the filter, so every case must converge
    # quickly: check that 2000 steps of the recursion from P = I get there.
    X = np.eye(len(F))
    for _ in range(2000):
        X = F @ (X - X @ H.T @ np.linalg.solve(H @ X @ H.T + R, H @ X)) @ F.T + Q
    assert np.abs(X - P).max() <= 1e-12 * np.abs(P).max(), name
    S = H @ P @ H.T + R
    res = F @ P @ F.T - F @ P @ H.T @ np.linalg.solve(S, H @ P @ F.T) + Q - P
    cases.append({
        "name": name, "F": F.tolist(), "H": H.tolist(), "Q": Q.tolist(), "R": R.tolist(),
        "P_predicted": P.tolist(), "riccati_residual": float(np.abs(res).max()),
    })


T = 0.1
add("constant velocity, position sensor", [[1, T], [0, 1]], [[1, 0]],
    [[T**4 / 4, T**3 / 2], [T**3 / 2, T**2]], [[0.01]])
add("damped three-state, two sensors",
    [[0.95, 0.1, 0.0], [-0.2, 0.9, 0.05], [0.0, 0.0, 0.99]],
    [[1, 0, 0], [0, 0, 1]],
    [[0.01, 0.002, 0.0], [0.002, 0.02, 0.0], [0.0, 0.0, 0.001]],
    [[0.04, 0.01], [0.01, 0.09]])
add("oscillator with drift state",
    [[np.cos(0.3), np.sin(0.3), 0.1, 0.0], [-np.sin(0.3), np.cos(0.3), 0.0, 0.0],
     [0.0, 0.0, 1.0, 0.0], [0.0, 0.0, 0.0, 0.8]],
    [[1, 0, 0, 1], [0, 1, 0, 0]],
    np.diag([1e-3, 1e-3, 1e-3, 0.05]).tolist(), [[0.25, 0.02], [0.02, 0.1]])

out = {"generator": "tests/data/make_dare_fixtures.py", "scipy_version": scipy.__version__,
       "numpy_version": np.__version__, "cases": cases}
path = pathlib.Path(__file__).with_name("dare_fixtures.json")
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path} with {len(cases)} cases (scipy {scipy.__version__})")
