//! Pieces shared by the writers of v1 model sections: a matrix as JSON rows, and a linear
//! formula `c1*s1 + c2*s2 - ...` over named states and inputs, in the formula language
//! that `/v1/estimate` compiles (numbers in shortest round-trip exponent form, so the
//! formula carries the fitted coefficient exactly).

use nalgebra::DMatrix;
use serde_json::Value;

/// A matrix as an array of rows of JSON numbers (every entry finite, as the fits ensure).
pub fn rows(m: &DMatrix<f64>) -> Value {
    Value::Array(
        (0..m.nrows())
            .map(|i| Value::Array((0..m.ncols()).map(|j| Value::from(m[(i, j)])).collect()))
            .collect(),
    )
}

/// `Σ coefficient·name` over the pairs whose coefficient is not zero, as formula text;
/// `"0"` when every coefficient is zero. Each coefficient is written in shortest
/// round-trip exponent form (`-2.5e-1`), a negative one after ` - `.
pub fn linear_formula<'a>(terms: impl IntoIterator<Item = (f64, &'a str)>) -> String {
    let mut out = String::new();
    for (c, name) in terms {
        if c == 0.0 {
            continue;
        }
        if out.is_empty() {
            if c < 0.0 {
                out.push('-');
            }
        } else {
            out.push_str(if c < 0.0 { " - " } else { " + " });
        }
        out.push_str(&format!("{:e}*{name}", c.abs()));
    }
    if out.is_empty() {
        out.push('0');
    }
    out
}

/// Names `prefix1 .. prefixN`.
pub fn numbered(prefix: &str, n: usize) -> Vec<String> {
    (1..=n).map(|k| format!("{prefix}{k}")).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_linear_formula_keeps_signs_skips_zeros_and_round_trips_its_numbers() {
        let f = linear_formula([(0.1, "s1"), (0.0, "s2"), (-2.5e-7, "s3"), (3.0, "u")]);
        assert_eq!(f, "1e-1*s1 - 2.5e-7*s3 + 3e0*u");
        assert_eq!(linear_formula([(-1.0, "a")]), "-1e0*a");
        assert_eq!(linear_formula([(0.0, "a")]), "0");
        let x = 0.1 + 0.2;
        let text = linear_formula([(x, "a")]);
        let back: f64 = text.trim_end_matches("*a").parse().unwrap();
        assert_eq!(back, x, "shortest round-trip form");
    }
}
