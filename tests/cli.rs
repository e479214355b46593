//! The `tacit` binary's subcommands as a user runs them: exit codes and readable errors.

use std::io::Write;
use std::process::{Command, Stdio};

fn tacit() -> Command {
    Command::new(env!("CARGO_BIN_EXE_tacit"))
}

#[test]
fn help_lists_the_subcommands_without_demo() {
    let out = tacit().arg("--help").output().unwrap();
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    for cmd in ["serve", "run", "check", "simulate", "calibrate", "identify"] {
        assert!(text.contains(cmd), "{cmd} in {text}");
    }
    let out = tacit().args(["serve", "--help"]).output().unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    for flag in [
        "--addr",
        "TACIT_ADDR",
        "--max-body-bytes",
        "TACIT_MAX_CONCURRENCY",
        "--cors-origins",
        "--shutdown-grace-secs",
        "--api-keys-file",
    ] {
        assert!(text.contains(flag), "{flag} in {text}");
    }
}

#[test]
fn a_missing_file_is_a_readable_error_and_a_failure() {
    let out = tacit()
        .args(["run", "/nonexistent/trolley.json"])
        .output()
        .unwrap();
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.starts_with("error: cannot open /nonexistent/trolley.json"),
        "{err}"
    );
}

#[test]
fn smoothing_an_ndjson_stream_is_refused() {
    let mut child = tacit()
        .args(["run", "--smooth", "-"])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    child
        .stdin
        .take()
        .unwrap()
        .write_all(
            b"{\"model\": {}, \"filter\": {\"method\": \"ekf\"}, \"prior\": {}}\n{\"t\": 1}\n",
        )
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("--smooth needs the whole batch"));
}

#[test]
fn bad_limit_flags_are_refused() {
    let out = tacit()
        .args(["check", "-", "--deadline-secs=-3"])
        .stdin(Stdio::null())
        .output()
        .unwrap();
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("--deadline-secs"));
}

#[test]
fn calibrate_reads_a_file_prints_the_answer_and_draws_no_bar_off_a_terminal() {
    let dir = std::env::temp_dir().join(format!("tacit-cli-cal-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("tower.json");
    std::fs::write(
        &path,
        crate::support::cart_request(3, 100, 0.5, 0.2).to_string(),
    )
    .unwrap();
    let out = tacit().arg("calibrate").arg(&path).output().unwrap();
    let _ = std::fs::remove_dir_all(&dir);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let a: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert!(a["free"]["/model/sensors/encoder/std"]["value"].is_number());
    assert!(a["request"]["measurements"].as_array().unwrap().len() == 100);
    // Standard error is a pipe here, not a terminal: no progress bar on it.
    assert!(
        out.stderr.is_empty(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}
