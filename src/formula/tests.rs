//! Unit tests of the formula module: grammar and precedence, every function against
//! std's `f64` functions, exact derivatives against hand-derived closed forms, error
//! columns and messages, hostile nesting, batch against point evaluation, and sharing.

use super::*;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const LIMITS: FormulaLimits = FormulaLimits {
    max_len: 4096,
    max_depth: 64,
};

fn sources<'a>(formulas: &[&'a str]) -> Vec<Source<'a>> {
    formulas
        .iter()
        .enumerate()
        .map(|(i, &text)| Source {
            text,
            pointer: format!("/f/{i}"),
        })
        .collect()
}

fn compile(formulas: &[&str], slots: &[&str], consts: &[(&str, f64)]) -> Program {
    match Program::compile(&sources(formulas), slots, consts, &LIMITS) {
        Ok(p) => p,
        Err(e) => panic!("{formulas:?} failed: {e:?}"),
    }
}

/// Value of one formula over slots `x, y, z` (unused ones are harmless).
fn val(f: &str, vars: &[f64]) -> f64 {
    let p = compile(&[f], &["x", "y", "z"][..vars.len()], &[]);
    let mut ws = p.workspace();
    let mut out = [0.0];
    p.eval(vars, &mut ws, &mut out);
    out[0]
}

/// Value and gradient of one formula over slots `x, y, z`.
fn grad(f: &str, vars: &[f64]) -> (f64, Vec<f64>) {
    let p = compile(&[f], &["x", "y", "z"][..vars.len()], &[]);
    let mut ws = p.workspace();
    let mut out = [0.0];
    let mut jac = vec![0.0; vars.len()];
    p.eval_jacobian(vars, vars.len(), &mut ws, &mut out, &mut jac);
    (out[0], jac)
}

fn err_with(
    f: &str,
    slots: &[&str],
    consts: &[(&str, f64)],
    limits: &FormulaLimits,
) -> FormulaError {
    match Program::compile(&sources(&[f]), slots, consts, limits) {
        Ok(_) => panic!("{f:?} compiled"),
        Err(mut e) => {
            assert_eq!(e.len(), 1);
            e.remove(0)
        }
    }
}

fn err(f: &str) -> FormulaError {
    err_with(f, &["x", "y"], &[], &LIMITS)
}

/// Relative closeness with a few ulps of slack for the chain of roundings.
fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-14 * (1.0 + b.abs())
}

macro_rules! assert_close {
    ($a:expr, $b:expr) => {{
        let (a, b): (f64, f64) = ($a, $b);
        assert!(close(a, b), "{} = {a:e}, expected {b:e}", stringify!($a));
    }};
}

// ---------------------------------------------------------------- grammar and values

#[test]
fn precedence_and_associativity() {
    // Conventional precedence (common practice): ^ tightest and right-associative,
    // unary minus below ^, then * / then + -, both left-associative.
    assert_eq!(val("-2^2", &[]), -4.0);
    assert_eq!(val("2^3^2", &[]), 512.0);
    assert_eq!(val("2*3+4", &[]), 10.0);
    assert_eq!(val("2+3*4", &[]), 14.0);
    assert_eq!(val("8/4/2", &[]), 1.0);
    assert_eq!(val("1-2-3", &[]), -4.0);
    assert_eq!(val("2^-1", &[]), 0.5);
    assert_eq!(val("(2+3)*4", &[]), 20.0);
    assert_eq!(val("2*-3", &[]), -6.0);
    assert_eq!(val("+3 - -2", &[]), 5.0);
    assert_eq!(val("--3", &[]), 3.0);
    // The same with a variable, so nothing is folded at compile time.
    assert_eq!(val("-x^2", &[3.0]), -9.0);
    assert_eq!(val("2^-x", &[1.0]), 0.5);
    assert_eq!(val("x^y^2", &[2.0, 3.0]), 512.0);
    assert_eq!(val("x/y/2", &[8.0, 4.0]), 1.0);
    assert_eq!(val("-x^-y", &[2.0, 1.0]), -0.5);
}

#[test]
fn number_forms() {
    // Decimal notation as in common practice (C / JSON-like literals).
    assert_eq!(val(".5", &[]), 0.5);
    assert_eq!(val("2.", &[]), 2.0);
    assert_eq!(val("1e-3", &[]), 1e-3);
    assert_eq!(val("1.5E+2", &[]), 150.0);
    assert_eq!(val("  7  ", &[]), 7.0);
}

#[test]
fn every_function_matches_std() {
    // Independent values: std's own f64 functions at the same points.
    let (x, y, z) = (0.37_f64, -1.3_f64, 0.9_f64);
    let v = [x, y, z];
    assert_eq!(val("sin(x)", &v), x.sin());
    assert_eq!(val("cos(y)", &v), y.cos());
    assert_eq!(val("tan(x)", &v), x.tan());
    assert_eq!(val("asin(x)", &v), x.asin());
    assert_eq!(val("acos(x)", &v), x.acos());
    assert_eq!(val("atan(y)", &v), y.atan());
    assert_eq!(val("atan2(y, x)", &v), y.atan2(x));
    assert_eq!(val("sinh(y)", &v), y.sinh());
    assert_eq!(val("cosh(y)", &v), y.cosh());
    assert_eq!(val("tanh(y)", &v), y.tanh());
    assert_eq!(val("exp(y)", &v), y.exp());
    assert_eq!(val("ln(z)", &v), z.ln());
    assert_eq!(val("log10(z)", &v), z.log10());
    assert_eq!(val("sqrt(z)", &v), z.sqrt());
    assert_eq!(val("abs(y)", &v), 1.3);
    assert_eq!(val("sign(y)", &v), -1.0);
    assert_eq!(val("sign(x)", &v), 1.0);
    assert_eq!(val("sign(x - x)", &v), 0.0);
    assert_eq!(val("min(x, y)", &v), y);
    assert_eq!(val("max(x, y)", &v), x);
    assert_eq!(val("pow(z, x)", &v), z.powf(x));
    assert_eq!(val("z^x", &v), z.powf(x));
    assert_eq!(val("hypot(x, y)", &v), x.hypot(y));
    assert_eq!(val("clamp(y, -1, 1)", &v), -1.0);
    assert_eq!(val("clamp(z, -1, 0.5)", &v), 0.5);
    assert_eq!(val("clamp(x, -1, 1)", &v), x);
    assert_eq!(val("pi", &[]), std::f64::consts::PI);
    assert_eq!(val("e", &[]), std::f64::consts::E);
    // Folded at compile time: the same values.
    assert_eq!(val("atan2(-1.3, 0.37)", &[]), y.atan2(x));
    assert_eq!(val("hypot(3, 4)", &[]), 5.0);
    // Integer powers keep the sign of a negative base (calculus: (-2)^3 = -8).
    assert_eq!(val("x^3", &[-2.0]), -8.0);
    assert_eq!(val("pow(x, -2)", &[-2.0]), 0.25);
}

#[test]
fn invalid_arguments_give_nan_or_inf_not_panics() {
    assert!(val("sqrt(x)", &[-1.0]).is_nan());
    assert!(val("sqrt(-1)", &[]).is_nan());
    assert_eq!(val("ln(x)", &[0.0]), f64::NEG_INFINITY);
    assert_eq!(val("1/x", &[0.0]), f64::INFINITY);
    assert!(val("min(x, y)", &[f64::NAN, 1.0]).is_nan());
    assert!(val("max(x, y)", &[1.0, f64::NAN]).is_nan());
    // lo > hi must not panic (std's clamp would): below lo gives lo first.
    assert_eq!(val("clamp(x, 3, 1)", &[0.0]), 3.0);
    assert_eq!(val("clamp(x, 3, 1)", &[5.0]), 1.0);
    let (_, g) = grad("sqrt(x) + ln(y)", &[0.0, 0.0]);
    assert_eq!(g[0], f64::INFINITY);
}

// ---------------------------------------------------------------- names and constants

#[test]
fn constants_fold_and_slots_shadow_them() {
    let p = compile(&["force / mass"], &["force"], &[("mass", 4.0)]);
    let mut ws = p.workspace();
    let mut out = [0.0];
    p.eval(&[10.0], &mut ws, &mut out);
    assert_eq!(out[0], 2.5);
    // 2*pi is folded; only the multiplication by r remains.
    let p = compile(&["2*pi*r"], &["r"], &[]);
    assert_eq!(p.instructions(), 1);
    // A slot wins over a constant and over `e`.
    let p = compile(&["mass + e"], &["mass", "e"], &[("mass", 5.0)]);
    let mut ws = p.workspace();
    p.eval(&[1.0, 2.0], &mut ws, &mut out);
    assert_eq!(out[0], 3.0);
    // A caller constant wins over `pi`.
    let p = compile(&["pi"], &[], &[("pi", 3.0)]);
    let mut ws = p.workspace();
    p.eval(&[], &mut ws, &mut out);
    assert_eq!(out[0], 3.0);
}

#[test]
fn outputs_may_be_bare_slots_or_constants() {
    let p = compile(&["vel", "3", "pos"], &["pos", "vel"], &[]);
    assert_eq!((p.outputs(), p.slots(), p.instructions()), (3, 2, 0));
    let mut ws = p.workspace();
    let mut out = [0.0; 3];
    let mut jac = [9.0; 6];
    p.eval_jacobian(&[1.5, -2.0], 2, &mut ws, &mut out, &mut jac);
    assert_eq!(out, [-2.0, 3.0, 1.5]);
    assert_eq!(jac, [0.0, 1.0, 0.0, 0.0, 1.0, 0.0]);
}

#[test]
fn depends_on_is_structural() {
    let p = compile(
        &["vel", "(force - drag*vel*abs(vel))/mass", "0*pos"],
        &["pos", "vel", "force"],
        &[("drag", 0.4), ("mass", 12.0)],
    );
    assert!(!p.depends_on(0, 0) && p.depends_on(0, 1) && !p.depends_on(0, 2));
    assert!(!p.depends_on(1, 0) && p.depends_on(1, 1) && p.depends_on(1, 2));
    assert!(p.depends_on(2, 0));
    assert!(!p.depends_on(3, 0) && !p.depends_on(0, 3));
    // Past one 64-bit word of slots.
    let names: Vec<String> = (0..70).map(|i| format!("s{i}")).collect();
    let slots: Vec<&str> = names.iter().map(String::as_str).collect();
    let p = compile(&["s69 + s1"], &slots, &[]);
    let read: Vec<usize> = (0..70).filter(|&s| p.depends_on(0, s)).collect();
    assert_eq!(read, [1, 69]);
}

// ---------------------------------------------------------------- derivatives

#[test]
fn derivatives_of_elementary_functions_match_closed_forms() {
    // Closed forms from calculus (common practice), evaluated independently.
    let x = 0.42_f64;
    let d = |f: &str| grad(f, &[x]).1[0];
    assert_close!(d("sin(x)"), x.cos());
    assert_close!(d("cos(x)"), -x.sin());
    assert_close!(d("tan(x)"), 1.0 / (x.cos() * x.cos()));
    assert_close!(d("asin(x)"), 1.0 / (1.0 - x * x).sqrt());
    assert_close!(d("acos(x)"), -1.0 / (1.0 - x * x).sqrt());
    assert_close!(d("atan(x)"), 1.0 / (1.0 + x * x));
    assert_close!(d("sinh(x)"), x.cosh());
    assert_close!(d("cosh(x)"), x.sinh());
    // tanh' = sech^2 = 1/cosh^2.
    assert_close!(d("tanh(x)"), 1.0 / (x.cosh() * x.cosh()));
    assert_close!(d("exp(2*x)"), 2.0 * (2.0 * x).exp());
    assert_close!(d("ln(x)"), 1.0 / x);
    assert_close!(d("log10(x)"), 1.0 / (x * 10f64.ln()));
    assert_close!(d("sqrt(x)"), 0.5 / x.sqrt());
    assert_close!(d("abs(x)"), 1.0);
    assert_close!(d("abs(-x)"), 1.0);
    assert_close!(d("sign(x)"), 0.0);
    assert_close!(d("x^3"), 3.0 * x * x);
    assert_close!(d("x^-2"), -2.0 / (x * x * x));
    assert_close!(d("1/x"), -1.0 / (x * x));
    assert_close!(d("sin(x)^2"), 2.0 * x.sin() * x.cos());
    assert_close!(d("exp(sin(x))"), x.cos() * x.sin().exp());
}

#[test]
fn derivatives_of_two_argument_functions_match_closed_forms() {
    let (x, y) = (0.8_f64, -0.6_f64);
    let g = |f: &str| grad(f, &[x, y]).1;
    // atan2(y, x): d/dy = x/(x^2+y^2), d/dx = -y/(x^2+y^2) (calculus).
    let r2 = x * x + y * y;
    let j = g("atan2(y, x)");
    assert_close!(j[0], -y / r2);
    assert_close!(j[1], x / r2);
    // hypot(x, y): d/dx = x/h, d/dy = y/h.
    let h = r2.sqrt();
    let j = g("hypot(x, y)");
    assert_close!(j[0], x / h);
    assert_close!(j[1], y / h);
    // Quotient rule: d(x/y)/dx = 1/y, d/dy = -x/y^2.
    let j = g("x/y");
    assert_close!(j[0], 1.0 / y);
    assert_close!(j[1], -x / (y * y));
    // Product rule.
    let j = g("x*y*y");
    assert_close!(j[0], y * y);
    assert_close!(j[1], 2.0 * x * y);
    // pow(a, b), a > 0: d/da = b a^(b-1), d/db = a^b ln a.
    let (a, b) = (1.7_f64, 2.3_f64);
    let j = grad("pow(x, y)", &[a, b]).1;
    assert_close!(j[0], b * a.powf(b - 1.0));
    assert_close!(j[1], a.powf(b) * a.ln());
    let j = grad("x^y", &[a, b]).1;
    assert_close!(j[1], a.powf(b) * a.ln());
    // pow with a < 0 and an integer exponent held in a slot: the a-part is
    // b a^(b-1) = 3 * (-2)^2 = 12, the b-part is left out (documented convention).
    let (v, j) = grad("pow(x, y)", &[-2.0, 3.0]);
    assert_eq!(v, -8.0);
    assert_close!(j[0], 12.0);
    assert_eq!(j[1], 0.0);
}

#[test]
fn kink_conventions() {
    // The conventions documented in the module doc; the smooth pieces are calculus.
    // abs'(0) = 0, sign' = 0.
    assert_eq!(grad("abs(x)", &[0.0]).1, [0.0]);
    assert_eq!(grad("sign(x)", &[0.0]).1, [0.0]);
    // min/max follow the selected argument; ties pick the first.
    assert_eq!(grad("min(x, y)", &[1.0, 2.0]).1, [1.0, 0.0]);
    assert_eq!(grad("min(x, y)", &[3.0, 2.0]).1, [0.0, 1.0]);
    assert_eq!(grad("min(x, y)", &[2.0, 2.0]).1, [1.0, 0.0]);
    assert_eq!(grad("min(y, x)", &[2.0, 2.0]).1, [0.0, 1.0]);
    assert_eq!(grad("max(x, 2*y)", &[5.0, 1.0]).1, [1.0, 0.0]);
    assert_eq!(grad("max(x, 2*y)", &[1.0, 1.0]).1, [0.0, 2.0]);
    assert_eq!(grad("max(x, y)", &[2.0, 2.0]).1, [1.0, 0.0]);
    // clamp(x, lo, hi) with lo = 2y, hi = 3z: follows x on [lo, hi] inclusive.
    let c = "clamp(x, 2*y, 3*z)";
    assert_eq!(grad(c, &[1.0, 0.0, 1.0]).1, [1.0, 0.0, 0.0]);
    assert_eq!(grad(c, &[0.0, 0.0, 1.0]).1, [1.0, 0.0, 0.0]);
    assert_eq!(grad(c, &[3.0, 0.0, 1.0]).1, [1.0, 0.0, 0.0]);
    assert_eq!(grad(c, &[-1.0, 0.0, 1.0]).1, [0.0, 2.0, 0.0]);
    assert_eq!(grad(c, &[4.0, 0.0, 1.0]).1, [0.0, 0.0, 3.0]);
    // hypot at the origin: 0, like abs.
    assert_eq!(grad("hypot(x, y)", &[0.0, 0.0]).1, [0.0, 0.0]);
    // sqrt at 0: +inf, but a slot the output does not read stays exactly 0.
    let j = grad("sqrt(x)", &[0.0, 1.0]).1;
    assert_eq!(j, [f64::INFINITY, 0.0]);
    // x^2 at a negative point: 2x (calculus), no NaN from a logarithm.
    assert_eq!(grad("x^2", &[-3.0]), (9.0, vec![-6.0]));
    assert_eq!(grad("x^0", &[-3.0]), (1.0, vec![0.0]));
}

#[test]
fn jacobian_of_a_swaying_hook_load_and_a_partial_column_set() {
    // A crane's hook load swaying with damping: f = [x2, -sin(x1) - 0.1 x2, t*x1]; by hand
    // J = [[0, 1, 0], [-cos(x1), -0.1, 0], [t, 0, x1]].
    let p = compile(
        &["x2", "-sin(x1) - 0.1*x2", "t*x1"],
        &["x1", "x2", "t"],
        &[],
    );
    let vars = [0.3, -1.2, 2.0];
    let mut ws = p.workspace();
    let mut out = [0.0; 3];
    let mut jac = [0.0; 9];
    p.eval_jacobian(&vars, 3, &mut ws, &mut out, &mut jac);
    let expect = [0.0, 1.0, 0.0, -(0.3f64.cos()), -0.1, 0.0, 2.0, 0.0, 0.3];
    for (a, b) in jac.iter().zip(expect) {
        assert_close!(*a, b);
    }
    assert_close!(out[1], -(0.3f64.sin()) + 0.12);
    let mut plain = [0.0; 3];
    p.eval(&vars, &mut ws, &mut plain);
    assert_eq!(out.map(f64::to_bits), plain.map(f64::to_bits));
    // Only the two state columns (t is not differentiated).
    let mut jac2 = [0.0; 6];
    p.eval_jacobian(&vars, 2, &mut ws, &mut out, &mut jac2);
    assert_eq!(jac2, [0.0, 1.0, jac[3], -0.1, 2.0, 0.0]);
}

// ---------------------------------------------------------------- errors

#[test]
fn error_columns_and_messages() {
    // Expected columns are counted by hand in each input (1-based characters).
    let e = err("x + sinn(y)");
    assert_eq!(e.column, 5);
    assert!(e
        .message
        .starts_with("unknown function 'sinn' at column 5; functions are sin, cos"));
    assert!(e.message.contains("clamp"));
    let e = err("2 * (x + 1");
    assert_eq!(e.column, 5);
    assert!(e.message.contains("missing ')'"), "{}", e.message);
    let e = err("x + 1)");
    assert_eq!(
        (e.column, e.message.as_str()),
        (6, "unmatched ')' at column 6")
    );
    let e = err("x 2");
    assert_eq!(e.column, 3);
    assert!(e.message.starts_with("unexpected number at column 3"));
    assert_eq!(err("").column, 1);
    assert_eq!(err("   ").message, "empty formula");
    let e = err("x +");
    assert_eq!(e.column, 4);
    assert!(e.message.contains("ends too early"));
    let e = err("x * 1e+ 2");
    assert_eq!(
        (e.column, e.message.as_str()),
        (5, "bad number '1e+' at column 5")
    );
    let e = err("2x");
    assert_eq!(
        (e.column, e.message.as_str()),
        (1, "bad number '2x' at column 1")
    );
    assert_eq!(err("1.2.3").message, "bad number '1.2.3' at column 1");
    assert!(err("1e999").message.contains("too large"));
    let e = err("x # 2");
    assert_eq!(
        (e.column, e.message.as_str()),
        (3, "unexpected character '#' at column 3")
    );
    let e = err("sin + 1");
    assert_eq!(e.column, 1);
    assert!(e.message.contains("parentheses"));
    let e = err("(x + y,)");
    assert_eq!(e.column, 7);
    let e = err("max(x, )");
    assert_eq!(e.column, 8);
    assert!(e.message.starts_with("unexpected ')' at column 8"));
    assert_eq!(err("sin(x").column, 4);
    assert_eq!(err("*x").column, 1);
}

#[test]
fn wrong_arity_points_at_the_function_name() {
    let e = err("x + atan2(x)");
    assert_eq!(e.column, 5);
    assert_eq!(
        e.message,
        "function 'atan2' at column 5 takes 2 arguments, not 1"
    );
    assert_eq!(err("clamp(x, 1)").column, 1);
    assert_eq!(
        err("y*sin()").message,
        "function 'sin' at column 3 takes 1 argument, not 0"
    );
    assert_eq!(err("2 + min(x, y, 1, 2)").column, 5);
}

#[test]
fn unknown_name_lists_the_known_ones() {
    let slots = ["pos", "vel", "force"];
    let e = err_with("pos+vell", &slots, &[("mass", 1.0), ("t", 0.0)], &LIMITS);
    assert_eq!(e.column, 5);
    assert_eq!(
        e.message,
        "unknown name 'vell' at column 5; known names are pos, vel, force, mass, t"
    );
    assert_eq!(e.pointer, "/f/0");
}

#[test]
fn columns_count_characters_not_bytes() {
    // "ü" is two bytes in UTF-8 but one column.
    let e = err_with("ü + q", &["ü"], &[], &LIMITS);
    assert_eq!(e.column, 5);
    let e = err_with("x·y", &["x", "y"], &[], &LIMITS);
    assert_eq!(
        (e.column, e.message.as_str()),
        (2, "unexpected character '·' at column 2")
    );
    let e = err_with("\u{1F600}", &[], &[], &LIMITS);
    assert_eq!(e.column, 1);
    assert_eq!(val("x", &[1.0]), 1.0);
}

#[test]
fn every_failing_formula_is_reported() {
    let srcs = sources(&["x +", "x", "foo(x)", "y"]);
    let e = Program::compile(&srcs, &["x", "y"], &[], &LIMITS).unwrap_err();
    let got: Vec<(&str, usize)> = e.iter().map(|e| (e.pointer.as_str(), e.column)).collect();
    assert_eq!(got, [("/f/0", 4), ("/f/2", 1)]);
}

#[test]
fn hostile_nesting_is_refused_cleanly() {
    let wide = FormulaLimits {
        max_len: 1_000_000,
        max_depth: 64,
    };
    let parens = format!("{}x{}", "(".repeat(100_000), ")".repeat(100_000));
    let e = err_with(&parens, &["x"], &[], &wide);
    assert_eq!(e.column, 65);
    assert!(e.message.contains("nests deeper than 64"), "{}", e.message);
    let minus = format!("{}x", "-".repeat(100_000));
    let e = err_with(&minus, &["x"], &[], &wide);
    assert_eq!(e.column, 65);
    let calls = format!("{}x{}", "sin(".repeat(100_000), ")".repeat(100_000));
    assert!(err_with(&calls, &["x"], &[], &wide)
        .message
        .contains("nests"));
    let powers = format!("2{}", "^2".repeat(100_000));
    assert!(err_with(&powers, &[], &[], &wide).message.contains("nests"));
    // A configured depth above the ceiling acts as the ceiling.
    let huge = FormulaLimits {
        max_len: 1_000_000,
        max_depth: usize::MAX,
    };
    let e = err_with(&parens, &["x"], &[], &huge);
    assert!(e
        .message
        .contains(&format!("deeper than {MAX_DEPTH_CEILING}")));
    // Right at the limits everything still parses (and does not overflow the stack).
    let at = |n: usize| format!("{}x{}", "(".repeat(n), ")".repeat(n));
    assert!(Program::compile(&sources(&[&at(64)]), &["x"], &[], &wide).is_ok());
    assert!(Program::compile(&sources(&[&at(65)]), &["x"], &[], &wide).is_err());
    let deep = at(MAX_DEPTH_CEILING);
    assert!(Program::compile(&sources(&[&deep]), &["x"], &[], &huge).is_ok());
}

#[test]
fn length_limit() {
    let short = FormulaLimits {
        max_len: 10,
        max_depth: 64,
    };
    let e = err_with("x + x + x + x", &["x"], &[], &short);
    assert_eq!(e.column, 11);
    assert!(e.message.contains("13 characters long; the limit is 10"));
    // Counted in characters: ten two-byte letters fit.
    let name = "é".repeat(10);
    assert!(Program::compile(&sources(&[&name]), &[&name], &[], &short).is_ok());
}

// ---------------------------------------------------------------- sharing and batches

#[test]
fn shared_subexpressions_are_computed_once_with_unchanged_results() {
    let formulas = ["sin(x)*y + cos(x)", "sin(x)*y - 1", "y*sin(x)"];
    let joint = compile(&formulas, &["x", "y"], &[]);
    // By hand: sin(x), sin(x)*y, cos(x), the sum and the difference = 5 instructions;
    // compiled one by one they take 4 + 2 + 2.
    assert_eq!(joint.instructions(), 5);
    let mut ws = joint.workspace();
    for vars in [[0.3, 2.0], [-1.1, 0.5]] {
        let mut out = [0.0; 3];
        joint.eval(&vars, &mut ws, &mut out);
        for (k, f) in formulas.iter().enumerate() {
            let alone = compile(&[f], &["x", "y"], &[]);
            let mut w = alone.workspace();
            let mut o = [0.0];
            alone.eval(&vars, &mut w, &mut o);
            assert_eq!(out[k].to_bits(), o[0].to_bits());
        }
        assert_close!(out[2], vars[0].sin() * vars[1]);
    }
}

#[test]
fn batch_equals_point_evaluation_bit_for_bit() {
    let programs: [&[&str]; 3] = [
        &["vel", "-sin(pos) - 0.1*vel"],
        &[
            "atan2(pos, vel) + hypot(pos, vel) * tanh(vel) - pos^3 + pow(abs(vel), 0.7)",
            "clamp(pos, -0.5, 0.5) + min(pos, vel) - max(pos, 2*vel) + sign(vel)",
            "exp(-pos^2) / (1 + cosh(vel)) + ln(1 + vel^2) + log10(2 + sin(pos))",
            "sqrt(abs(pos)) + asin(pos/4) + acos(vel/4) + atan(pos*vel) + tan(pos/3) + sinh(vel)",
        ],
        &["pos / vel", "sqrt(vel)"],
    ];
    let points = [
        [0.3, -1.2],
        [-2.5, 0.7],
        [0.0, 0.0],
        [1.9, 3.1],
        [-0.4, -0.4],
    ];
    let m = points.len();
    for formulas in programs {
        let p = compile(formulas, &["pos", "vel"], &[]);
        // A workspace larger than the batch: only the first m points are used.
        let mut bws = p.batch_workspace(m + 3);
        assert_eq!(bws.capacity(), m + 3);
        let mut vars = vec![0.0; 2 * m];
        for (j, pt) in points.iter().enumerate() {
            vars[j] = pt[0];
            vars[m + j] = pt[1];
        }
        let mut out = vec![0.0; p.outputs() * m];
        p.eval_batch(&vars, m, &mut bws, &mut out);
        let mut ws = p.workspace();
        let mut one = vec![0.0; p.outputs()];
        for (j, pt) in points.iter().enumerate() {
            p.eval(pt, &mut ws, &mut one);
            for k in 0..p.outputs() {
                assert_eq!(
                    out[k * m + j].to_bits(),
                    one[k].to_bits(),
                    "{formulas:?} {pt:?}"
                );
            }
        }
        // The same slots given in two pieces (the first slot in `head`, the second in
        // `tail`), as the integrators pass them.
        let mut split = vec![0.0; p.outputs() * m];
        p.eval_batch_split(&vars[..m], &vars[m..], m, &mut bws, &mut split);
        let bits = |x: &[f64]| x.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(&split), bits(&out), "{formulas:?} split");
        // A smaller batch in the same workspace.
        p.eval_batch(
            &[points[3][0], points[3][1]],
            1,
            &mut bws,
            &mut out[..p.outputs()],
        );
        p.eval(&points[3], &mut ws, &mut one);
        for k in 0..p.outputs() {
            assert_eq!(out[k].to_bits(), one[k].to_bits());
        }
    }
}

// ---------------------------------------------------------------- randomized check

/// A value with its gradient over (x, y), carried by textbook differentiation rules,
/// independently of the compiler's tape.
#[derive(Clone, Copy)]
struct Dual {
    v: f64,
    d: [f64; 2],
}

impl Dual {
    fn chain(self, v: f64, g: f64) -> Dual {
        Dual {
            v,
            d: [g * self.d[0], g * self.d[1]],
        }
    }
}

/// A random formula over x and y and its value and gradient at `at`.
fn random_formula(rng: &mut ChaCha8Rng, depth: u32, at: [f64; 2]) -> (String, Dual) {
    if depth == 0 || rng.gen_bool(0.2) {
        return match rng.gen_range(0..3) {
            0 => (
                "x".into(),
                Dual {
                    v: at[0],
                    d: [1.0, 0.0],
                },
            ),
            1 => (
                "y".into(),
                Dual {
                    v: at[1],
                    d: [0.0, 1.0],
                },
            ),
            _ => {
                let c = f64::from(rng.gen_range(1..20)) / 8.0;
                (
                    format!("{c}"),
                    Dual {
                        v: c,
                        d: [0.0, 0.0],
                    },
                )
            }
        };
    }
    let (sa, a) = random_formula(rng, depth - 1, at);
    match rng.gen_range(0..9) {
        0..=3 => {
            let (sb, b) = random_formula(rng, depth - 1, at);
            let add = |s: f64| Dual {
                v: a.v + s * b.v,
                d: [a.d[0] + s * b.d[0], a.d[1] + s * b.d[1]],
            };
            match rng.gen_range(0..3) {
                0 => (format!("({sa} + {sb})"), add(1.0)),
                1 => (format!("({sa} - {sb})"), add(-1.0)),
                _ => (
                    format!("({sa} * {sb})"),
                    Dual {
                        v: a.v * b.v,
                        d: [a.d[0] * b.v + a.v * b.d[0], a.d[1] * b.v + a.v * b.d[1]],
                    },
                ),
            }
        }
        4 => (format!("sin({sa})"), a.chain(a.v.sin(), a.v.cos())),
        5 => (format!("cos({sa})"), a.chain(a.v.cos(), -a.v.sin())),
        6 => {
            let t = a.v.tanh();
            (format!("tanh({sa})"), a.chain(t, 1.0 - t * t))
        }
        7 => (
            format!("atan({sa})"),
            a.chain(a.v.atan(), 1.0 / (1.0 + a.v * a.v)),
        ),
        _ => (format!("(-({sa})^2)"), a.chain(-a.v * a.v, -2.0 * a.v)),
    }
}

#[test]
fn random_formulas_match_independent_dual_numbers() {
    // Seeded (seed 2024) so a failure is reproducible.
    let mut rng = ChaCha8Rng::seed_from_u64(2024);
    for _ in 0..300 {
        let at = [rng.gen_range(-2.0..2.0), rng.gen_range(-2.0..2.0)];
        let (f, want) = random_formula(&mut rng, 5, at);
        let (v, g) = grad(&f, &at);
        let tol = |w: f64| 1e-12 * (1.0 + w.abs());
        assert!(
            (v - want.v).abs() <= tol(want.v),
            "{f} at {at:?}: {v} vs {}",
            want.v
        );
        for j in 0..2 {
            assert!(
                (g[j] - want.d[j]).abs() <= tol(want.d[j]),
                "{f} at {at:?}: d{j} {} vs {}",
                g[j],
                want.d[j]
            );
        }
    }
}

// Affine recognition. Coefficients are read off the formulas by hand (algebra).

fn affine(formulas: &[&str], cols: usize) -> Option<AffineForm> {
    compile(formulas, &["x", "y", "u", "t"], &[("k", 2.0)]).affine_form(cols)
}

#[test]
fn affine_form_reads_coefficients_and_offset() {
    // 3x - y/4 + 2u + k*5 and -(x + k*y) + 1: coefficients by hand.
    let a = affine(&["3*x - y/4 + 2*u + k*5", "-(x + k*y) + 1", "7"], 3).expect("affine");
    assert_eq!(
        a.jacobian,
        vec![3.0, -0.25, 2.0, -1.0, -2.0, 0.0, 0.0, 0.0, 0.0]
    );
    assert_eq!(a.offset, vec![10.0, 1.0, 7.0]);
    // x^1 and (x*3)/k stay affine; sin of a constant is a constant.
    let b = affine(&["x^1 + (x*3)/k + sin(k)"], 2).expect("affine");
    assert_eq!(b.jacobian, vec![1.0 + 1.5, 0.0]);
    assert_eq!(b.offset, vec![2.0f64.sin()]);
}

#[test]
fn affine_form_refuses_everything_else() {
    for f in [
        "x*y",
        "x^2",
        "1/x",
        "sin(x)",
        "abs(x)",
        "min(x, 1)",
        "pow(x, 1.5)",
        "x*t",
        "t",
        "x + 0*t",
        "sqrt(y)",
    ] {
        assert!(affine(&[f], 3).is_none(), "{f} taken as affine");
    }
    // u past `cols` counts as a variable that is not allowed.
    assert!(affine(&["x + u"], 2).is_none());
    // A non-finite coefficient falls back to the general path.
    assert!(affine(&["x/0"], 2).is_none());
}
