//! `POST /v1/calibrate` over a real server: the fitted request gives the reported
//! log-likelihood on /v1/estimate, progress streams as NDJSON, and bad pointers are 422s
//! at the pointer.

use crate::support::{assert_pointer, assert_problem, cart_request, post, start_default};

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_fitted_request_gives_the_reported_log_likelihood_on_estimate() {
    let s = start_default().await;
    let req = cart_request(11, 400, 0.5, 0.2);
    let a = post(&s, "/v1/calibrate", "application/json", req.to_string()).await;
    assert_eq!(a.status, 200, "{}", a.text);
    assert_eq!(a.body["converged"], true, "{}", a.body["detail"]);
    let best = a.body["log_likelihood"]["best"].as_f64().unwrap();
    assert!(best > a.body["log_likelihood"]["start"].as_f64().unwrap());
    let fitted = a.body["request"].to_string();
    let e = post(&s, "/v1/estimate", "application/json", fitted).await;
    assert_eq!(e.status, 200, "{}", e.text);
    let ll = e.body["summary"]["log_likelihood"].as_f64().unwrap();
    // The same filter code sums the same terms (issue 11: to 1e-9 relative).
    assert!(((ll - best) / best).abs() < 1e-9, "{ll} vs {best}");
    assert_eq!(e.body["summary"], a.body["summary_after"]);
    assert!(e.body["estimates"].as_array().unwrap().len() == 400);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn progress_streams_one_line_per_run_and_the_answer_last() {
    let s = start_default().await;
    let req = cart_request(12, 200, 0.5, 0.2);
    let plain = post(&s, "/v1/calibrate", "application/json", req.to_string()).await;
    let res = s
        .client
        .post(s.url("/v1/calibrate"))
        .header("content-type", "application/json")
        .header("accept", "application/x-ndjson")
        .body(req.to_string())
        .send()
        .await
        .unwrap();
    assert_eq!(res.status().as_u16(), 200);
    assert_eq!(
        res.headers()["content-type"].to_str().unwrap(),
        "application/x-ndjson"
    );
    let text = res.text().await.unwrap();
    let lines: Vec<serde_json::Value> = text
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let (last, progress) = lines.split_last().unwrap();
    assert_eq!(progress.len() as u64, last["runs"].as_u64().unwrap());
    let mut runs: Vec<u64> = progress
        .iter()
        .map(|l| l["run"].as_u64().unwrap())
        .collect();
    runs.sort_unstable();
    assert_eq!(runs, (1..=progress.len() as u64).collect::<Vec<_>>());
    assert_eq!(last["free"], plain.body["free"]);
}

#[tokio::test]
async fn pointers_to_nothing_or_outside_the_likelihood_are_422_at_the_pointer() {
    let s = start_default().await;
    for (ptr, bad) in [
        ("/model/sensors/encoder/bias", "/model/sensors/encoder/bias"),
        (
            "/model/sensors/encoder/measures",
            "/model/sensors/encoder/measures",
        ),
        ("/output/covariance", "/output/covariance"),
        ("/filter/gate/probability", "/filter/gate/probability"),
    ] {
        let mut req = cart_request(1, 20, 0.5, 0.2);
        req["free"] = serde_json::json!({ ptr: {} });
        let a = post(&s, "/v1/calibrate", "application/json", req.to_string()).await;
        assert_problem(&a, 422);
        assert_pointer(&a, bad);
    }
    let mut req = cart_request(1, 20, 0.5, 0.2);
    req["search"] = serde_json::json!({"starts": 0});
    let a = post(&s, "/v1/calibrate", "application/json", req.to_string()).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/search/starts");
}
