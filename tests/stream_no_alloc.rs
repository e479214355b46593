//! A stream line costs no heap allocation once the stream is warm: reading its time
//! (seconds, or a timestamp with its offset or in the request's time zone), stepping the
//! filter, keeping the last good belief aside and writing the estimate with the time as
//! it was written (brief of issue 10: the per-line reader is the hot path). Counted per
//! thread with the `allocation-counter` crate, as in `no_alloc.rs`.

use serde_json::json;
use tacit::config::Limits;
use tacit::job::StreamSession;

/// Allocations made by pushing `lines[8..]` after the first eight, into an output
/// buffer reserved beforehand.
fn allocations(header: &serde_json::Value, lines: &[String]) -> u64 {
    let header = serde_json::to_vec(header).unwrap();
    let mut session =
        StreamSession::start(&header, &Limits::default(), &tacit::job::Stop::never()).unwrap();
    let mut out = Vec::with_capacity(8 << 20);
    for (i, l) in lines[..8].iter().enumerate() {
        session.push(l.as_bytes(), i as u64 + 2, &mut out).unwrap();
    }
    out.clear();
    let info = allocation_counter::measure(|| {
        for (i, l) in lines[8..].iter().enumerate() {
            session.push(l.as_bytes(), i as u64 + 10, &mut out).unwrap();
        }
    });
    assert!(out.len() < 8 << 20, "the output buffer had to grow");
    info.count_total
}

#[test]
fn a_warm_stream_line_allocates_nothing_whatever_its_time_form() {
    // A kiln's wall temperature read by a thermocouple once a second.
    let model = json!({"states": ["temp", "rate"], "dynamics": {"rates": {"temp": "rate"}},
                       "process_noise": {"density": {"rate": 0.01}},
                       "sensors": {"thermo": {"measures": "temp", "std": 0.5}}});
    let reading = |k: usize| 600.0 + 0.2 * k as f64 + if k % 3 == 0 { 0.4 } else { -0.3 };
    // (label, prior time, time of line k)
    type Form = (
        &'static str,
        serde_json::Value,
        fn(usize) -> serde_json::Value,
    );
    let forms: [Form; 4] = [
        ("seconds", json!(0.0), |k| json!(k as f64)),
        ("offset", json!("2026-03-01T06:00:00+01:00"), |k| {
            json!(format!("2026-03-01T06:{:02}:{:02}.5+01:00", k / 60, k % 60))
        }),
        ("utc", json!("2026-03-01T05:00:00Z"), |k| {
            json!(format!("2026-03-01 05:{:02}:{:02}Z", k / 60, k % 60))
        }),
        ("time_zone", json!("2026-03-01 06:00:00"), |k| {
            json!(format!("2026-03-01 06:{:02}:{:02}", k / 60, k % 60))
        }),
    ];
    for method in ["ekf", "ukf", "enkf"] {
        for (label, t0, t) in &forms {
            let mut header = json!({
                "model": model,
                "filter": {"method": method, "ensemble": {"members": 8, "seed": 2}},
                "prior": {"t": t0, "mean": {"temp": 600.0, "rate": 0.0},
                          "std": {"temp": 5.0, "rate": 1.0}}
            });
            if *label == "time_zone" {
                header["time_zone"] = json!("Europe/Berlin");
            }
            let lines: Vec<String> = (1..=300)
                .map(|k| json!({"t": t(k), "values": {"thermo": reading(k)}}).to_string())
                .collect();
            let n = allocations(&header, &lines);
            assert_eq!(
                n, 0,
                "{method}, times as {label}: {n} allocations in 292 lines"
            );
        }
    }
}

#[test]
fn a_warm_family_stream_line_allocates_nothing() {
    // A cooling channel of 2,000 cells, probes on every second cell (one line carries
    // 1,000 readings), 12 members with the local update. The lines run inside a pool of
    // one thread, so the forecast and analysis that rayon would spread over workers are
    // counted here too.
    let n = 2_000;
    let header = json!({
        "model": {"families": {"cell": {"size": n, "boundary": "periodic"}},
                  "parameters": {"k": 0.3},
                  "dynamics": {"rates": {"cell[i]": "k*(cell[i+1] - 2*cell[i] + cell[i-1])"}},
                  "sensors": {"probe": {"measures": "cell[i]", "every": 2, "std": 0.5}}},
        "filter": {"method": "enkf", "integration": {"fixed_step": 0.05},
                   "ensemble": {"members": 12, "seed": 4, "update": "local", "radius": 5}},
        "prior": {"t": 0, "mean": {"cell": 20.0}, "std": {"cell": 1.0}}
    });
    let lines: Vec<String> = (1..=40)
        .map(|k| {
            let z: Vec<f64> = (0..n / 2)
                .map(|i| 20.0 + ((i * 7 + k * 3) % 11) as f64 * 0.1)
                .collect();
            json!({"t": k as f64 * 0.1, "values": {"probe": z}}).to_string()
        })
        .collect();
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .unwrap();
    let count = pool.install(|| allocations(&header, &lines));
    assert_eq!(count, 0, "{count} allocations in 32 family lines");
}
