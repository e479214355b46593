//! Speed of `sparse` identification (issue 12): 3 states, library of degree 3 (20 terms),
//! 100,000 samples, target under 1 s on the two-core development machine. Two cases: the
//! numerical core alone (library columns, integral rows, thresholded least squares) and
//! the whole job (JSON in, answer bytes out). Run with `cargo bench --bench identify`.

// A bench binary, not a library: no public items to document.
#![allow(missing_docs)]

use criterion::{criterion_group, criterion_main, Criterion};
use serde_json::{json, Value};
use tacit::config::Limits;
use tacit::identify::library::Library;
use tacit::identify::regress::{integral, stlsq, Columns};
use tacit::identify::Series;
use tacit::job::Stop;

/// An invented damped, driven 3-state oscillator (no outside reference: speed only),
/// stepped by classical RK4 at `h`.
fn samples(n: usize, h: f64) -> (Vec<f64>, [Vec<f64>; 3]) {
    let f = |x: [f64; 3]| {
        [
            x[1],
            -x[0] - 0.1 * x[1] + 0.5 * x[2],
            -0.3 * x[2] + 0.2 * x[0] * x[1],
        ]
    };
    let mut x = [1.0, 0.0, 0.5];
    let mut t = Vec::with_capacity(n);
    let mut cols = [
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
    ];
    for k in 0..n {
        t.push(k as f64 * h);
        for i in 0..3 {
            cols[i].push(x[i]);
        }
        let add =
            |a: [f64; 3], b: [f64; 3], c: f64| [a[0] + c * b[0], a[1] + c * b[1], a[2] + c * b[2]];
        let k1 = f(x);
        let k2 = f(add(x, k1, h / 2.0));
        let k3 = f(add(x, k2, h / 2.0));
        let k4 = f(add(x, k3, h));
        for i in 0..3 {
            x[i] += h / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]);
        }
    }
    (t, cols)
}

fn request(t: &[f64], cols: &[Vec<f64>; 3]) -> Value {
    let series: Vec<Value> = (0..t.len())
        .map(|k| json!({"t": t[k], "values": [cols[0][k], cols[1][k], cols[2][k]]}))
        .collect();
    json!({"form": "sparse", "states": ["a", "b", "c"], "series": series,
           "library": {"degree": 3}, "sparsity": 0.01, "holdout": 0.2})
}

fn bench(c: &mut Criterion) {
    let n = 100_000;
    let (t, cols) = samples(n, 0.01);
    let series = Series {
        t: t.clone(),
        values: cols.concat(),
        states: 3,
        inputs: 0,
    };
    let mut g = c.benchmark_group("identify");
    g.sample_size(10);
    g.bench_function("sparse_n3_deg3_terms20_samples1e5_core", |b| {
        b.iter(|| {
            let stop = Stop::never();
            let lib = Library::new(&["a", "b", "c"], 0, 3, None, &[]);
            let at = lib.columns(&series, &stop).unwrap();
            let cols = Columns {
                at,
                held: Vec::new(),
            };
            let d = integral(&series, &cols, &Columns::default(), (0, n), 1, &stop).unwrap();
            stlsq(&d, &lib.names, 0.01, &stop).unwrap()
        })
    });
    let body = serde_json::to_vec(&request(&t, &cols)).unwrap();
    let limits = Limits::default();
    g.bench_function("sparse_n3_deg3_terms20_samples1e5_job", |b| {
        b.iter(|| tacit::job::identify(&body, &limits, &Stop::never()).unwrap())
    });
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
