//! `/v1/identify` in the memory budget: its estimate bounds what a whole request
//! allocates, and a request over the budget is a plain 413 before any fit runs.

use crate::http_memory::needed_bytes;
use crate::support::{assert_problem, post, start};
use serde_json::{json, Value};
use tacit::config::Limits;
use tacit::http::ServerConfig;
use tacit::job::Stop;

/// An identify request of `m` samples of two states (or outputs) and one input; the input
/// carries a seeded pseudo-random part so that the subspace form sees a rich input.
fn body_of(form: &str, m: usize, degree: u32) -> Vec<u8> {
    let mut seed = 12_345u64;
    let series: Vec<Value> = (0..m)
        .map(|k| {
            seed = seed
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1_442_695_040_888_963_407);
            let noise = (seed >> 11) as f64 / (1u64 << 53) as f64 - 0.5;
            let t = k as f64 * 0.01;
            let a = t.sin() * 3.1;
            let b = (t * 0.7).cos() * 1.7 + 0.3 * (t * 2.3).sin();
            json!({"t": t, "values": [a, b], "inputs": [(t * 0.31).sin() + noise]})
        })
        .collect();
    let req = match form {
        "subspace" => json!({"form": form, "outputs": ["a", "b"], "inputs": ["u"],
                             "series": series}),
        _ => json!({"form": form, "states": ["a", "b"], "inputs": ["u"], "series": series,
                    "library": {"degree": degree}, "sparsity": 1e-6}),
    };
    serde_json::to_vec(&req).unwrap()
}

#[test]
fn the_identify_memory_estimate_bounds_what_it_allocates() {
    // The estimate is an upper bound within a factor of 1.6 of the peak a counting
    // allocator measures over the whole request, the body (held by the caller) added.
    // Cases where the JSON tree of the parse is the peak (linear, subspace, reduced) and
    // where the fit's columns and rows are (sparse, degree 5: 56 terms).
    let limits = Limits {
        max_request_bytes: u64::MAX,
        ..Limits::default()
    };
    for (form, degree) in [
        ("linear", 1),
        ("sparse", 5),
        ("subspace", 0),
        ("reduced", 0),
    ] {
        let body = body_of(form, 20_000, degree);
        let need = tacit::job::identify_memory(&body, &limits).unwrap() as f64;
        let no = Stop::never();
        let used = body.len() as f64
            + allocation_counter::measure(|| {
                let r = tacit::job::identify(&body, &limits, &no);
                assert!(r.is_ok(), "{form}: {:?}", r.err());
            })
            .bytes_max as f64;
        let ratio = need / used;
        eprintln!("identify {form}: estimate {need}, measured {used}, ratio {ratio:.2}");
        assert!(
            (1.0..=1.6).contains(&ratio),
            "{form}: estimate {need}, measured {used}, ratio {ratio}"
        );
    }
}

#[tokio::test]
async fn an_identify_over_the_memory_budget_is_a_413_and_the_server_goes_on() {
    // What a sparse fit must hold whatever the code: the series as binary64 (3 values a
    // sample) and one library column per term over every sample (56 terms at degree 5
    // over 3 variables, C(8, 3), common practice). 20,000 samples need more than 8 MB.
    let m = 20_000;
    let floor = (8 * m * (3 + 56)) as f64;
    let mut c = ServerConfig::default();
    c.limits.max_request_bytes = 8_000_000;
    assert!(floor > c.limits.max_request_bytes as f64);
    let s = start(c).await;
    let a = post(
        &s,
        "/v1/identify",
        "application/json",
        body_of("sparse", m, 5),
    )
    .await;
    assert_problem(&a, 413);
    assert_eq!(a.body["type"], "/problems/over-memory-budget");
    let detail = a.body["detail"].as_str().unwrap();
    assert!(needed_bytes(detail) >= floor, "{detail} < {floor}");
    let small = post(
        &s,
        "/v1/identify",
        "application/json",
        body_of("linear", 500, 1),
    )
    .await;
    assert_eq!(small.status, 200, "{}", small.text);
}
