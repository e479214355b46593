//! Issue 13 bench: one cycle (forecast of every member by one RK4 step, then the local
//! ensemble transform update) of Lorenz-96 written as one state family, F = 8, every
//! second element read with std 1, 20 members, radius 5, step 0.05, at n = 10³ … 10⁶,
//! with all threads and with one; and the size of the members written as JSON numbers
//! (what a posterior that carries them costs). In-process, wall clock, least of a few
//! cycles. Run with `cargo bench --bench large` (`TACIT_LARGE_MAX=100000` stops earlier).

// A bench binary, not a library: no public items to document.
#![allow(missing_docs)]

use std::time::Instant;
use tacit::dynamics::{FamilyRates, FamilyRk4};
use tacit::filter::enkf::{FamilyEnsemble, LocalReadings, LocalSettings};
use tacit::formula::{Boundary, FamilyKernel, FamilySet, FamilyShape, FormulaLimits, Source};

fn lorenz96(n: usize) -> FamilyRates {
    let set = FamilySet::new(vec![FamilyShape {
        name: "x".into(),
        size: n,
        boundary: Boundary::Periodic,
    }]);
    let src = Source {
        text: "(x[i+1] - x[i-2])*x[i-1] - x[i] + F",
        pointer: String::new(),
    };
    let limits = FormulaLimits {
        max_len: 200,
        max_depth: 32,
    };
    let k = FamilyKernel::compile(&src, n, &set, &[], &[("F", 8.0)], &limits).unwrap();
    FamilyRates {
        set,
        kernels: vec![k],
        arrays: vec![vec![]],
    }
}

/// A cheap deterministic spread (the bench measures time, not accuracy).
fn wiggle(k: usize) -> f64 {
    ((k as f64) * 0.618_033_988_749_894_9).fract() * 2.0 - 1.0
}

struct Case {
    fe: FamilyEnsemble,
    rd: LocalReadings,
}

fn setup(n: usize) -> Case {
    let h = 0.05;
    let rates = lorenz96(n);
    let mut x: Vec<f64> = (0..n).map(|i| 8.0 + 0.01 * wiggle(i)).collect();
    let mut rk = FamilyRk4::new(&rates);
    for _ in 0..100 {
        rk.step(&rates, &mut x, 0.0, h);
    }
    let members = 20;
    let mut ens = Vec::with_capacity(members * n);
    for j in 0..members {
        for (i, &v) in x.iter().enumerate() {
            ens.push(v + wiggle(j * n + i + 1));
        }
    }
    let settings = LocalSettings {
        radius: Some(5.0),
        inflation: 1.02,
    };
    let fe = FamilyEnsemble::new(rates, ens, members, settings, n / 2);
    let mut rd = LocalReadings::default();
    for s in (0..n).step_by(2) {
        rd.push(s, s, x[s] + 0.5 * wiggle(s + 7), 1.0);
    }
    Case { fe, rd }
}

/// Least seconds of (forecast, analysis, whole cycle) over `repeats` cycles.
fn time(case: &mut Case, repeats: usize) -> (f64, f64, f64) {
    let (mut f, mut a, mut c) = (f64::INFINITY, f64::INFINITY, f64::INFINITY);
    for r in 0..repeats {
        let t0 = Instant::now();
        case.fe.forecast(r as f64 * 0.05, 0.05).unwrap();
        let t1 = Instant::now();
        case.fe.analyse(&case.rd).unwrap();
        let t2 = Instant::now();
        f = f.min((t1 - t0).as_secs_f64());
        a = a.min((t2 - t1).as_secs_f64());
        c = c.min((t2 - t0).as_secs_f64());
    }
    (f, a, c)
}

/// Bytes of the members written as a JSON array of arrays of shortest round-trip numbers.
fn members_json_bytes(fe: &FamilyEnsemble) -> usize {
    let mut b = zmij::Buffer::new();
    let (n, mut bytes) = (fe.n(), 2);
    for row in fe.ensemble().chunks(n) {
        bytes += 3;
        for &x in row {
            bytes += b.format(x).len() + 1;
        }
    }
    bytes
}

fn main() {
    let max: usize = std::env::var("TACIT_LARGE_MAX")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(1_000_000);
    let threads = rayon::current_num_threads();
    println!("lorenz96 family, 20 members, radius 5, every 2nd read; {threads} threads");
    println!(
        "{:>9} {:>8} {:>11} {:>11} {:>11} {:>11} {:>8}",
        "n", "threads", "forecast s", "analysis s", "cycle s", "1-thread s", "speedup"
    );
    for n in [1_000, 10_000, 100_000, 1_000_000] {
        if n > max {
            break;
        }
        let repeats = if n >= 1_000_000 { 3 } else { 5 };
        let mut case = setup(n);
        let (f, a, c) = time(&mut case, repeats);
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let (_, _, c1) = pool.install(|| {
            let mut one = setup(n);
            time(&mut one, repeats)
        });
        println!(
            "{n:>9} {threads:>8} {f:>11.4} {a:>11.4} {c:>11.4} {c1:>11.4} {:>8.2}",
            c1 / c
        );
        if n == 100_000 {
            let bytes = members_json_bytes(&case.fe);
            println!(
                "members of 20 x 100,000 as JSON: {bytes} bytes ({:.1} MB)",
                bytes as f64 / 1e6
            );
        }
    }
}
