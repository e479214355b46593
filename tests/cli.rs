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
    for cmd in ["serve", "run", "check", "simulate"] {
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
