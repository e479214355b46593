//! `POST /v1/identify` through a real server: R12 (Lorenz-63 by `sparse`), the `known`
//! form on a water tower with an invented outlet loss, `linear` on a kiln, the answer's
//! model accepted by `/v1/estimate`, and refusals at their fields.

use crate::support::{assert_pointer, assert_problem, post_json, start_default, Answer};
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use serde_json::{json, Value};

/// Lorenz (1963), J. Atmos. Sci. 20, eq. (25)–(27): x' = σ(y − x), y' = x(ρ − z) − y,
/// z' = xy − βz with σ = 10, ρ = 28, β = 8/3 (REFERENCES R12).
fn lorenz(v: [f64; 3]) -> [f64; 3] {
    let (s, r, b) = (10.0, 28.0, 8.0 / 3.0);
    [
        s * (v[1] - v[0]),
        v[0] * (r - v[2]) - v[1],
        v[0] * v[1] - b * v[2],
    ]
}

/// Classical fourth-order Runge–Kutta (common practice), `sub` steps per sample of `h`.
fn rk4(
    f: impl Fn([f64; 3]) -> [f64; 3],
    x0: [f64; 3],
    h: f64,
    sub: usize,
    n: usize,
) -> Vec<[f64; 3]> {
    let add =
        |a: [f64; 3], b: [f64; 3], c: f64| [a[0] + c * b[0], a[1] + c * b[1], a[2] + c * b[2]];
    let d = h / sub as f64;
    let mut x = x0;
    let mut out = Vec::with_capacity(n);
    for _ in 0..n {
        out.push(x);
        for _ in 0..sub {
            let k1 = f(x);
            let k2 = f(add(x, k1, d / 2.0));
            let k3 = f(add(x, k2, d / 2.0));
            let k4 = f(add(x, k3, d));
            for i in 0..3 {
                x[i] += d / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]);
            }
        }
    }
    out
}

/// Readings of the Lorenz states every `h` seconds for `n` samples, with Gaussian noise of
/// `rel` times each state's standard deviation over the run (seeded).
fn lorenz_series(h: f64, n: usize, rel: f64, seed: u64) -> Vec<Value> {
    let xs = rk4(lorenz, [-8.0, 7.0, 27.0], h, 10, n);
    let mut sd = [0.0; 3];
    for i in 0..3 {
        let mean = xs.iter().map(|x| x[i]).sum::<f64>() / n as f64;
        sd[i] = (xs.iter().map(|x| (x[i] - mean).powi(2)).sum::<f64>() / n as f64).sqrt();
    }
    let mut rng = rand_chacha::ChaCha20Rng::seed_from_u64(seed);
    let mut z = || -> f64 { StandardNormal.sample(&mut rng) };
    xs.iter()
        .enumerate()
        .map(|(k, x)| {
            let v: Vec<f64> = (0..3).map(|i| x[i] + rel * sd[i] * z()).collect();
            json!({"t": k as f64 * h, "values": {"x": v[0], "y": v[1], "z": v[2]}})
        })
        .collect()
}

/// The coefficient of `term` in `state`'s rate, if it survived.
fn coefficient(a: &Answer, state: &str, term: &str) -> Option<f64> {
    a.body["terms"]
        .as_array()
        .unwrap()
        .iter()
        .find(|t| t["state"] == state && t["term"] == term)
        .map(|t| t["coefficient"].as_f64().unwrap())
}

/// R12: the seven true terms of Lorenz-63 and nothing else survive, each within `tol`
/// (relative) of Lorenz (1963), J. Atmos. Sci. 20; the recovery itself is the
/// demonstration of Brunton, Proctor & Kutz (2016), PNAS 113(15), Fig. 1.
fn assert_lorenz(a: &Answer, tol: f64) {
    assert_eq!(a.status, 200, "{}", a.text);
    let truth = [
        ("x", "x", -10.0),
        ("x", "y", 10.0),
        ("y", "x", 28.0),
        ("y", "y", -1.0),
        ("y", "x*z", -1.0),
        ("z", "x*y", 1.0),
        ("z", "z", -8.0 / 3.0),
    ];
    let terms = a.body["terms"].as_array().unwrap();
    assert_eq!(
        terms.len(),
        7,
        "exactly the seven true terms (R12): {}",
        a.text
    );
    for (state, term, want) in truth {
        let got = coefficient(a, state, term)
            .unwrap_or_else(|| panic!("{term} in {state}' is missing: {}", a.text));
        assert!(
            ((got - want) / want).abs() < tol,
            "{state}': {term} is {got}, Lorenz (1963) gives {want} (R12, within {tol})"
        );
    }
}

fn lorenz_request(series: Vec<Value>, window: usize) -> Value {
    json!({"form": "sparse", "states": ["x", "y", "z"], "series": series,
           "library": {"degree": 2}, "sparsity": 0.1, "holdout": 0.2, "window": window})
}

#[tokio::test]
async fn r12_lorenz_by_sparse_keeps_the_seven_true_terms_noise_free() {
    let s = start_default().await;
    let a = post_json(
        &s,
        "/v1/identify",
        &lorenz_request(lorenz_series(0.002, 10_000, 0.0, 1), 1),
    )
    .await;
    // R12: within 1 % noise-free.
    assert_lorenz(&a, 0.01);
    // Its model runs a filter as it is (with a prior and readings).
    let model = a.body["model"].clone();
    let est = json!({
        "model": model,
        "filter": {"method": "ekf"},
        "prior": {"t": 0, "mean": {"x": -8.0, "y": 7.0, "z": 27.0},
                  "std": {"x": 1.0, "y": 1.0, "z": 1.0}},
        "measurements": [
            {"t": 0.01, "values": {"x_reading": -7.2, "y_reading": 6.0, "z_reading": 27.5}},
            {"t": 0.02, "values": {"x_reading": -6.6}}
        ]
    });
    let e = post_json(&s, "/v1/estimate", &est).await;
    assert_eq!(e.status, 200, "the identified model is refused: {}", e.text);
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn r12_lorenz_by_sparse_keeps_the_seven_true_terms_with_one_percent_noise() {
    let s = start_default().await;
    let series = lorenz_series(0.002, 50_000, 0.01, 7);
    let a = post_json(&s, "/v1/identify", &lorenz_request(series, 5)).await;
    // R12: within 5 % with 1 % noise.
    assert_lorenz(&a, 0.05);
    s.shutdown().await.unwrap();
}

/// A series entry's values taken away, and a request whose library is too big for it.
#[tokio::test]
async fn refusals_name_their_field() {
    let s = start_default().await;
    let few = lorenz_series(0.01, 15, 0.0, 1);
    let a = post_json(&s, "/v1/identify", &lorenz_request(few, 1)).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/series");

    let mut bad = lorenz_request(lorenz_series(0.01, 100, 0.0, 1), 1);
    bad["series"][3]["values"] = json!({"x": 1.0, "y": 2.0});
    bad["series"][5]["t"] = json!(0.0);
    bad["library"]["terms"] = json!(["sin(x"]);
    let a = post_json(&s, "/v1/identify", &bad).await;
    assert_problem(&a, 422);
    for p in ["/series/3/values/z", "/series/5/t", "/library/terms/0"] {
        assert_pointer(&a, p);
    }

    // A constant input: its column is one more constant.
    let mut still = lorenz_request(lorenz_series(0.01, 400, 0.0, 1), 1);
    still["inputs"] = json!(["fan"]);
    for e in still["series"].as_array_mut().unwrap() {
        e["inputs"] = json!({"fan": 0.5});
    }
    let a = post_json(&s, "/v1/identify", &still).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/inputs/0");

    // Two library terms that are the same column.
    let mut twin = lorenz_request(lorenz_series(0.01, 400, 0.0, 1), 1);
    twin["library"]["terms"] = json!(["x*y"]);
    let a = post_json(&s, "/v1/identify", &twin).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/library");
    assert!(a.text.contains("x*y"), "{}", a.text);

    // Two samples are far too few for a subspace fit: refused at the series.
    let sub = json!({"form": "subspace", "outputs": ["y1"], "inputs": ["u"], "order": "auto",
                     "series": [{"t": 0, "values": [1.0], "inputs": [0.0]},
                                {"t": 1, "values": [2.0], "inputs": [1.0]}]});
    let a = post_json(&s, "/v1/identify", &sub).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/series");
    s.shutdown().await.unwrap();
}

/// Pump flow (L/s) of the water-tower scenario at time `t`: 25 and 45 in turns of 20,000 s.
fn pump(t: f64) -> f64 {
    if (t / 20_000.0).floor() as i64 % 2 == 0 {
        25.0
    } else {
        45.0
    }
}

/// An invented water tower (demo plant, with an outlet loss of our own): the known
/// balance (pump − draw_off)/(1000·area) and a loss `loss·sqrt(level)`, `loss` = 1e-4.
fn tower(loss: Option<f64>) -> Value {
    let level = match loss {
        Some(k) => format!("(pump - draw_off)/(1000*area) - {k:e}*sqrt(level)"),
        None => "(pump - draw_off)/(1000*area)".to_string(),
    };
    json!({
        "states": ["level", "draw_off"],
        "inputs": ["pump"],
        "parameters": {"area": 80.0},
        "dynamics": {"rates": {"level": level, "draw_off": "0"}},
        "process_noise": {"density": {"level": 1e-9, "draw_off": 1e-4}},
        "sensors": {"level_gauge": {"measures": "level", "std": 0.003}}
    })
}

/// RMSE of the estimated `draw_off` against the truth.
fn draw_off_rmse(est: &Answer, truth: &[f64]) -> f64 {
    let e = est.body["estimates"].as_array().unwrap();
    assert_eq!(e.len(), truth.len(), "{}", est.text);
    let sum: f64 = e
        .iter()
        .zip(truth)
        .map(|(l, x)| (l["mean"]["draw_off"].as_f64().unwrap() - x).powi(2))
        .sum();
    (sum / truth.len() as f64).sqrt()
}

#[tokio::test]
async fn known_form_fits_the_outlet_loss_and_its_model_recovers_the_draw_off() {
    let s = start_default().await;
    let n = 20_000;
    let step = 10.0;
    let changes: Vec<Value> = (1..10)
        .map(|i| json!({"t": i as f64 * 20_000.0, "inputs": {"pump": pump(i as f64 * 20_000.0)}}))
        .collect();
    let sim = json!({
        "model": tower(Some(1e-4)),
        "prior": {"t": 0, "mean": {"level": 5.0, "draw_off": 15.0},
                  "std": {"level": 0.0, "draw_off": 0.0}, "inputs": {"pump": 25.0}},
        "times": {"start": step, "step": step, "count": n},
        "inputs": changes,
        "seed": 12
    });
    let truth = post_json(&s, "/v1/simulate", &sim).await;
    assert_eq!(truth.status, 200, "{}", truth.text);
    let lines = truth.body["truth"].as_array().unwrap();
    let t: Vec<f64> = lines.iter().map(|l| l["t"].as_f64().unwrap()).collect();
    let level: Vec<f64> = lines
        .iter()
        .map(|l| l["state"]["level"].as_f64().unwrap())
        .collect();
    let draw: Vec<f64> = lines
        .iter()
        .map(|l| l["state"]["draw_off"].as_f64().unwrap())
        .collect();
    assert!(level.iter().all(|&h| h > 0.5), "the tower must not run dry");

    // Noisy readings of both states (gauge 3 mm, flow meter 0.2 L/s).
    let mut rng = rand_chacha::ChaCha20Rng::seed_from_u64(5);
    let mut z = || -> f64 { StandardNormal.sample(&mut rng) };
    let read_level: Vec<f64> = level.iter().map(|h| h + 0.003 * z()).collect();
    let series: Vec<Value> = (0..t.len())
        .map(|k| {
            json!({"t": t[k], "values": {"level": read_level[k], "draw_off": draw[k] + 0.2 * z()},
                        "inputs": {"pump": pump(t[k])}})
        })
        .collect();
    let req = json!({
        "form": "known", "states": ["level", "draw_off"], "inputs": ["pump"],
        "series": series,
        "known": {"rates": {"level": "(pump - draw_off)/80000", "draw_off": "0"}},
        "library": {"degree": 0, "terms": ["sqrt(level)"]},
        "sparsity": 1e-5, "window": 10, "holdout": 0.2
    });
    let a = post_json(&s, "/v1/identify", &req).await;
    assert_eq!(a.status, 200, "{}", a.text);
    // The invented loss is 1e-4 (scenario of our own, no outside value): within 2 %.
    let k = coefficient(&a, "level", "sqrt(level)").expect("the loss term survives");
    assert!(
        (k + 1e-4).abs() < 2e-6,
        "loss coefficient {k}, true -1e-4: {}",
        a.text
    );
    let rate = a.body["model"]["dynamics"]["rates"]["level"]
        .as_str()
        .unwrap();
    assert!(rate.starts_with("(pump - draw_off)/80000 + ("), "{rate}");

    // Estimate draw_off from the level gauge alone, with the true model and the identified one.
    let meas: Vec<Value> = (0..t.len())
        .map(|k| {
            let mut l = json!({"t": t[k], "values": {"level_gauge": read_level[k]}});
            if k > 0 && pump(t[k]) != pump(t[k - 1]) {
                l["inputs"] = json!({"pump": pump(t[k])});
            }
            l
        })
        .collect();
    let prior = json!({"t": 0, "mean": {"level": 5.0, "draw_off": 12.0},
                       "std": {"level": 0.01, "draw_off": 3.0}, "inputs": {"pump": 25.0}});
    let mut found = a.body["model"].clone();
    found["sensors"] = json!({"level_gauge": {"measures": "level", "std": 0.003}});
    let run = |model: Value| {
        json!({"model": model, "filter": {"method": "ekf"},
                                    "prior": prior.clone(), "measurements": meas.clone()})
    };
    let with_true = post_json(&s, "/v1/estimate", &run(tower(Some(1e-4)))).await;
    let with_found = post_json(&s, "/v1/estimate", &run(found)).await;
    assert_eq!(with_found.status, 200, "{}", with_found.text);
    let (rt, rf) = (
        draw_off_rmse(&with_true, &draw),
        draw_off_rmse(&with_found, &draw),
    );
    // Brief of issue 12 (our own criterion): within 20 % of the true model's RMSE.
    assert!(
        rf <= 1.2 * rt,
        "identified model: RMSE {rf}, true model: {rt}"
    );
    s.shutdown().await.unwrap();
}

/// Drive force (N) of the conveyor scenario at time `t`: 500, −300, 0 in turns of 20 s.
fn drive(t: f64) -> f64 {
    [500.0, -300.0, 0.0][((t / 20.0).floor() as usize) % 3]
}

/// An invented bottling-conveyor carriage (mass 850 kg, rolling drag `drag` N·s/m),
/// position read by an encoder, speed not measured.
fn conveyor(drag: f64) -> Value {
    json!({
        "states": ["pos", "vel"],
        "inputs": ["drive"],
        "dynamics": {"rates": {"pos": "vel", "vel": format!("(drive - {drag:e}*vel)/850")}},
        "process_noise": {"density": {"vel": 0.0004}},
        "sensors": {"encoder": {"measures": "pos", "std": 0.002}}
    })
}

fn vel_rmse(est: &Answer, truth: &[(f64, f64)]) -> f64 {
    assert_eq!(est.status, 200, "{}", est.text);
    let e = est.body["estimates"].as_array().unwrap();
    let sum: f64 = e
        .iter()
        .zip(truth)
        .map(|(l, (_, v))| (l["mean"]["vel"].as_f64().unwrap() - v).powi(2))
        .sum();
    (sum / e.len() as f64).sqrt()
}

/// The workflow for a partly measured plant (README "Getting a model"): smooth under a
/// rough model to recover the unmeasured speed, identify the drag from the smoothed states
/// with the `known` form, calibrate the identified model's noise, and estimate with it.
/// The true drag (120) is the scenario's own; the checks compare with it and with the
/// rough model (drag 60), not with an outside figure.
#[tokio::test]
async fn smooth_then_identify_then_calibrate_improves_a_rough_model() {
    let s = start_default().await;
    let changes: Vec<Value> = (1..15)
        .map(|i| json!({"t": i as f64 * 20.0, "inputs": {"drive": drive(i as f64 * 20.0)}}))
        .collect();
    let prior = json!({"t": 0, "mean": {"pos": 0.0, "vel": 0.0},
                       "std": {"pos": 0.01, "vel": 0.1}, "inputs": {"drive": 500.0}});
    let sim = json!({"model": conveyor(120.0), "prior": prior.clone(),
                     "times": {"start": 0.1, "step": 0.1, "count": 3000},
                     "inputs": changes, "seed": 3});
    let sim = post_json(&s, "/v1/simulate", &sim).await;
    assert_eq!(sim.status, 200, "{}", sim.text);
    let truth: Vec<(f64, f64)> = sim.body["truth"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| {
            (
                l["t"].as_f64().unwrap(),
                l["state"]["vel"].as_f64().unwrap(),
            )
        })
        .collect();
    let meas = sim.body["measurements"].clone();
    let run = |model: Value| {
        json!({"model": model, "filter": {"method": "ekf"}, "prior": prior.clone(),
               "measurements": meas.clone()})
    };

    // 1. Smooth under the rough model: the speed, never measured, comes back.
    let sm = post_json(&s, "/v1/smooth", &run(conveyor(60.0))).await;
    assert_eq!(sm.status, 200, "{}", sm.text);
    let mut series: Vec<Value> = Vec::new();
    let mut last = f64::NEG_INFINITY;
    for e in sm.body["estimates"].as_array().unwrap() {
        let t = e["t"].as_f64().unwrap();
        if t > last {
            series
                .push(json!({"t": t, "values": e["mean"].clone(), "inputs": {"drive": drive(t)}}));
            last = t;
        }
    }

    // 2. Identify the drag: the force balance is known, the drag is the remainder.
    let id = json!({"form": "known", "states": ["pos", "vel"], "inputs": ["drive"],
                    "series": series,
                    "known": {"rates": {"pos": "vel", "vel": "drive/850"}},
                    "library": {"degree": 1}, "sparsity": 0.01});
    let a = post_json(&s, "/v1/identify", &id).await;
    assert_eq!(a.status, 200, "{}", a.text);
    let c = coefficient(&a, "vel", "vel").expect("the drag term survives");
    let (truth_c, rough_c) = (-120.0 / 850.0, -60.0 / 850.0);
    assert!(
        (c - truth_c).abs() < 0.1 * truth_c.abs()
            && (c - truth_c).abs() < (rough_c - truth_c).abs(),
        "drag coefficient {c}: true {truth_c}, rough {rough_c}: {}",
        a.text
    );

    // 3. Calibrate the identified model's noise on the original readings.
    let mut found = a.body["model"].clone();
    found["sensors"] = json!({"encoder": {"measures": "pos", "std": 0.01}});
    let mut cal = run(found);
    cal["free"] = json!({"/model/process_noise/density/vel": {}, "/model/sensors/encoder/std": {}});
    let cal = post_json(&s, "/v1/calibrate", &cal).await;
    assert_eq!(cal.status, 200, "{}", cal.text);

    // 4. The calibrated, identified model tracks the unmeasured speed better than the rough one.
    let tuned = post_json(&s, "/v1/estimate", &cal.body["request"]).await;
    let rough = post_json(&s, "/v1/estimate", &run(conveyor(60.0))).await;
    let (rt, rr) = (vel_rmse(&tuned, &truth), vel_rmse(&rough, &truth));
    assert!(
        rt < rr,
        "speed RMSE: identified and calibrated {rt}, rough {rr}"
    );
    s.shutdown().await.unwrap();
}
