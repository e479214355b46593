"""Writes tests/data/r15_fixtures.json: exact reference values for one position reading
taken after a long gap in a constant-velocity model (R15 in docs/references.md).

Why: after a gap of T seconds the predicted position variance grows like q*T^3/3, so at
T = 1e6 s it is about 1e14 while the reading's variance is 1e-4. The posterior position
variance P R / (P + R) is then about R, some 18 orders of magnitude below the prior it is
subtracted from, and a plain float64 update P - K S K' loses every digit of it. The filters
must be checked against values computed without rounding, so this script does the linear
algebra in exact rational arithmetic (fractions.Fraction) and rounds only when writing.

Model (as tacit writes it): states [position, velocity], rates position' = velocity,
velocity' = white noise of spectral density q. Over a gap T (Bar-Shalom, Li, Kirubarajan
2001, Estimation with Applications to Tracking and Navigation, sec. 6.2):
    F = [[1, T], [0, 1]],   Q = q [[T^3/3, T^2/2], [T^2/2, T]],
one position sensor H = [1, 0] with variance R, prior covariance P0 at t = 0.
For each gap:
    P-  = F P0 F' + Q                 predicted covariance
    S   = H P- H' + R                 innovation variance
    K   = P- H' / S                   gain
    P+  = P- - K S K'                 posterior covariance (exact, so the form is moot)
Cross-checks asserted below, all in exact arithmetic: the scalar closed form
P+_pos = P-_pos R / (P-_pos + R) (any estimation text; common practice), the matching
closed forms of the other two entries, the information form inv(P+) = inv(P-) + H' H / R,
and that P+ is symmetric positive definite.

The model constants are the decimal numbers as written (q = 4e-4 exactly, not the nearest
binary double); the script also recomputes with the exact values of the float64 inputs
and records the largest relative difference in the header, to show the choice does not
matter at the tolerances R15 uses.

It also prints (and keeps out of the fixture) how far a plain float64 evaluation of
P- - K S K' lands from the exact posterior, for every gap.

Run: python3 tests/data/make_r15_fixtures.py   (standard library only; deterministic)
"""
import json
import pathlib
import platform
from decimal import Decimal, ROUND_HALF_EVEN, localcontext
from fractions import Fraction

# Model constants, as decimal strings so Fraction holds them exactly.
Q_SPECTRAL = "4e-4"  # q, velocity random walk spectral density
R_SENSOR = "1e-4"  # position reading variance (std 0.01)
P0_DIAG = ("1e-4", "1e-2")  # prior variances of position and velocity at t = 0
GAPS = [10**k for k in range(13)]  # 1 s to 1e12 s, every decade
DIGITS = 25  # significant digits of the decimal strings in the fixture


def mat_mul(a, b):
    return [[sum(a[i][k] * b[k][j] for k in range(len(b))) for j in range(len(b[0]))]
            for i in range(len(a))]


def transpose(a):
    return [list(row) for row in zip(*a)]


def exact_step(T, q, r, p0):
    """One predict + update in exact rational arithmetic; returns (P-, S, K, P+)."""
    F = [[Fraction(1), T], [Fraction(0), Fraction(1)]]
    Qd = [[q * T**3 / 3, q * T**2 / 2], [q * T**2 / 2, q * T]]
    P0 = [[p0[0], Fraction(0)], [Fraction(0), p0[1]]]
    FP = mat_mul(mat_mul(F, P0), transpose(F))
    Pm = [[FP[i][j] + Qd[i][j] for j in range(2)] for i in range(2)]
    S = Pm[0][0] + r  # H P- H' + R with H = [1, 0]
    K = [Pm[0][0] / S, Pm[1][0] / S]  # P- H' / S
    Pp = [[Pm[i][j] - K[i] * S * K[j] for j in range(2)] for i in range(2)]
    return Pm, S, K, Pp


def check(T, r, Pm, S, K, Pp):
    """Exact cross-checks of one step; any failure stops the script before writing."""
    # Scalar closed form P+ = P R / (P + R) (any estimation text; common practice).
    assert Pp[0][0] == Pm[0][0] * r / (Pm[0][0] + r), T
    # The other entries in closed form: P+_pv = P-_pv R / S, P+_vv = P-_vv - P-_pv^2 / S.
    assert Pp[0][1] == Pm[0][1] * r / S and Pp[1][0] == Pp[0][1], T
    assert Pp[1][1] == Pm[1][1] - Pm[0][1] ** 2 / S, T
    # Information form: inv(P+) = inv(P-) + H' R^-1 H.
    Im = inv2(Pm)
    assert inv2(Pp) == [[Im[0][0] + 1 / r, Im[0][1]], [Im[1][0], Im[1][1]]], T
    # Symmetric positive definite, predicted and posterior.
    for P in (Pm, Pp):
        assert P[0][1] == P[1][0] and P[0][0] > 0 and P[0][0] * P[1][1] - P[0][1] ** 2 > 0, T
    assert S == Pm[0][0] + r and K[0] * S == Pm[0][0], T


def inv2(P):
    det = P[0][0] * P[1][1] - P[0][1] * P[1][0]
    return [[P[1][1] / det, -P[0][1] / det], [-P[1][0] / det, P[0][0] / det]]


def dec(x):
    """x rounded to DIGITS significant digits (half-even), as a string like 1.23...e-05."""
    with localcontext() as ctx:
        ctx.prec = DIGITS
        ctx.rounding = ROUND_HALF_EVEN
        d = Decimal(x.numerator) / Decimal(x.denominator)  # one correctly rounded division
    return f"{d:.{DIGITS - 1}e}"


def rounded(x, to):
    """Applies `to` to a Fraction, or to each entry of a vector or matrix of them."""
    return [rounded(v, to) for v in x] if isinstance(x, list) else to(x)


def both(x):
    """Decimal strings and nearest float64s (Fraction -> float rounds correctly)."""
    return {"decimal": rounded(x, dec), "f64": rounded(x, float)}


def naive_float_posterior(T, q, r, p0):
    """The plain float64 update P- - K S K', every operation rounded to double."""
    T = float(T)
    F = [[1.0, T], [0.0, 1.0]]
    Qd = [[q * T**3 / 3, q * T**2 / 2], [q * T**2 / 2, q * T]]
    P0 = [[p0[0], 0.0], [0.0, p0[1]]]
    FP = mat_mul(mat_mul(F, P0), transpose(F))
    Pm = [[FP[i][j] + Qd[i][j] for j in range(2)] for i in range(2)]
    S = Pm[0][0] + r
    K = [Pm[0][0] / S, Pm[1][0] / S]
    return [[Pm[i][j] - K[i] * S * K[j] for j in range(2)] for i in range(2)]


def main():
    q, r = Fraction(Q_SPECTRAL), Fraction(R_SENSOR)
    p0 = tuple(Fraction(v) for v in P0_DIAG)
    # The same model with the exact values of the float64 inputs a client would send.
    qf, rf = Fraction(float(Q_SPECTRAL)), Fraction(float(R_SENSOR))
    p0f = tuple(Fraction(float(v)) for v in P0_DIAG)

    gaps, input_rounding = [], Fraction(0)
    for t in GAPS:
        T = Fraction(t)
        Pm, S, K, Pp = exact_step(T, q, r, p0)
        check(T, r, Pm, S, K, Pp)
        Pf = exact_step(T, qf, rf, p0f)[3]
        for i in range(2):
            for j in range(2):
                input_rounding = max(input_rounding, abs(Pf[i][j] - Pp[i][j]) / abs(Pp[i][j]))
        gaps.append({
            "T": float(T),
            "predicted_covariance": both(Pm),
            "innovation_variance": both(S),
            "gain": both(K),
            "posterior_covariance": both(Pp),
        })
    assert input_rounding < Fraction(1, 10**14), float(input_rounding)

    out = {
        "generator": "tests/data/make_r15_fixtures.py",
        "method": "exact rational arithmetic (Python fractions.Fraction); each value "
                  f"rounded once at the end, to {DIGITS} significant digits (half-even) "
                  "for 'decimal' and to the nearest float64 for 'f64'",
        "python_version": platform.python_version(),
        "source": "REFERENCES R15: the scalar update P+ = P R / (P + R) in closed form, "
                  "any estimation text; common practice. Process noise Q = q [[T^3/3, "
                  "T^2/2], [T^2/2, T]]: Bar-Shalom, Li, Kirubarajan (2001) sec. 6.2",
        "model": {
            "states": ["position", "velocity"],
            "rates": ["velocity", "white noise of spectral density q"],
            "q": float(q), "R": float(r), "H": [1.0, 0.0],
            "prior_covariance": [[float(p0[0]), 0.0], [0.0, float(p0[1])]],
            "F": "[[1, T], [0, 1]]",
            "Q": "q [[T^3/3, T^2/2], [T^2/2, T]]",
            "constants_taken_as": "the decimal numbers as written, exactly",
            "max_relative_change_if_float64_inputs_taken_exactly": float(input_rounding),
        },
        "gaps": gaps,
    }
    path = pathlib.Path(__file__).with_name("r15_fixtures.json")
    path.write_text(json.dumps(out, indent=1, ensure_ascii=True) + "\n")
    print(f"wrote {path} with {len(gaps)} gaps (python {platform.python_version()})")

    print("\nplain float64 P- - K S K' against the exact posterior, relative error per entry")
    print(f"{'T':>8}  {'pos,pos':>10}  {'pos,vel':>10}  {'vel,pos':>10}  {'vel,vel':>10}")
    for t, g in zip(GAPS, gaps):
        naive = naive_float_posterior(t, float(Q_SPECTRAL), float(R_SENSOR),
                                      tuple(float(v) for v in P0_DIAG))
        exact = exact_step(Fraction(t), q, r, p0)[3]
        errs = [float(abs(Fraction(naive[i][j]) - exact[i][j]) / exact[i][j])
                for i in range(2) for j in range(2)]
        print(f"{t:8.0e}  " + "  ".join(f"{e:10.3e}" for e in errs))
        if t in (10**6, 10**8):
            print(f"{'':8}  naive posterior {naive}")


if __name__ == "__main__":
    main()
