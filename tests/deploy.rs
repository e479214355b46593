//! The deployment files (deploy/Dockerfile, deploy/k8s/*.yaml, deploy/systemd/tacit.service,
//! .ci/run) checked against the binary itself, without a Docker engine or a cluster.
//!
//! Ports come from the `--addr` default in [`tacit::cli`], probe and health-check paths
//! must be open GET routes of [`tacit::http::routes::all`] (the list the router is built
//! from), commands and environment variables must parse with the real clap definition,
//! and names that tie files together (image, Secret, labels, uid) must agree. The
//! Dockerfile's health check is also run for real, with bash, against a live server.

use crate::support::start_default;
use clap::CommandFactory;
use serde::Deserialize;
use serde_json::Value;
use std::collections::{BTreeMap, BTreeSet};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use tacit::cli::{Cli, Command};

/// The image repository every file refers to; the tag is the crate's version, so a
/// release that bumps Cargo.toml must bump the manifests too.
const IMAGE_REPO: &str = "registry.example.com/tacit";

fn image() -> String {
    format!("{IMAGE_REPO}:{}", env!("CARGO_PKG_VERSION"))
}

fn repo_path(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(rel)
}

fn read(rel: &str) -> String {
    std::fs::read_to_string(repo_path(rel)).unwrap_or_else(|e| panic!("cannot read {rel}: {e}"))
}

// ---------------------------------------------------------------------------------------
// The binary's own definition.

/// The `serve` subcommand as clap defines it.
fn serve_command() -> clap::Command {
    Cli::command()
        .find_subcommand("serve")
        .expect("a serve subcommand")
        .clone()
}

/// The `--addr` default, read from the definition (not from a parse, which would pick up
/// a TACIT_ADDR set in the environment running the tests).
fn default_addr() -> SocketAddr {
    let cmd = serve_command();
    let arg = cmd
        .get_arguments()
        .find(|a| a.get_id() == "addr")
        .expect("serve has --addr");
    let v = arg.get_default_values();
    assert_eq!(v.len(), 1, "one default address");
    v[0].to_str()
        .unwrap()
        .parse()
        .expect("default address parses")
}

fn default_port() -> u16 {
    default_addr().port()
}

/// Environment variable name -> long flag, for every argument of `serve`.
fn serve_env_flags() -> BTreeMap<String, String> {
    serve_command()
        .get_arguments()
        .filter_map(|a| {
            let env = a.get_env()?.to_str()?.to_string();
            Some((env, format!("--{}", a.get_long()?)))
        })
        .collect()
}

/// Parse `tacit ARGS...` with the real CLI definition.
fn parse_cli(args: &[&str]) -> Result<Cli, clap::Error> {
    let mut argv = vec!["tacit"];
    argv.extend_from_slice(args);
    use clap::FromArgMatches;
    let matches = Cli::command().try_get_matches_from(argv)?;
    Cli::from_arg_matches(&matches)
}

/// Check that `NAME=value` would be accepted by `tacit serve`: the name is one of its
/// variables and the value parses as the flag it stands for.
fn assert_serve_env(name: &str, value: &str, whence: &str) -> Cli {
    let flags = serve_env_flags();
    let flag = flags.get(name).unwrap_or_else(|| {
        panic!(
            "{whence}: {name} is not a variable of `tacit serve` (known: {:?})",
            flags.keys()
        )
    });
    parse_cli(&["serve", flag, value])
        .unwrap_or_else(|e| panic!("{whence}: {name}={value} is refused: {e}"))
}

/// The route must exist, answer GET, and need no key (probes carry none).
fn assert_open_get_route(path: &str, whence: &str) {
    let found = tacit::http::routes::all().find(|r| r.path == path);
    let r = found.unwrap_or_else(|| panic!("{whence}: {path} is not a route of the service"));
    assert_eq!(r.method, "GET", "{whence}: {path} is not a GET route");
    assert!(
        !r.keyed,
        "{whence}: {path} needs an API key; probes carry none"
    );
}

// ---------------------------------------------------------------------------------------
// Dockerfile.

/// One Dockerfile instruction, continuation lines joined and comments dropped.
#[derive(Debug)]
struct Instruction {
    keyword: String,
    args: String,
}

fn dockerfile() -> Vec<Instruction> {
    let text = read("deploy/Dockerfile");
    let mut out = Vec::new();
    let mut pending = String::new();
    for line in text.lines() {
        let t = line.trim();
        // Comment lines are removed even inside a continued instruction.
        if t.starts_with('#') || (t.is_empty() && pending.is_empty()) {
            continue;
        }
        if let Some(head) = t.strip_suffix('\\') {
            pending.push_str(head);
            pending.push(' ');
            continue;
        }
        pending.push_str(t);
        let full = std::mem::take(&mut pending);
        let (kw, args) = full.split_once(char::is_whitespace).unwrap_or((&full, ""));
        out.push(Instruction {
            keyword: kw.to_ascii_uppercase(),
            args: args.trim().to_string(),
        });
    }
    assert!(pending.is_empty(), "Dockerfile ends inside a continuation");
    out
}

fn instructions<'a>(all: &'a [Instruction], kw: &str) -> Vec<&'a Instruction> {
    all.iter().filter(|i| i.keyword == kw).collect()
}

/// Whitespace-normalised `cargo build ...` commands in `text`, cut at shell separators.
fn cargo_build_commands(text: &str) -> Vec<String> {
    let mut out = Vec::new();
    for line in text.lines() {
        let line = line.trim();
        if line.starts_with('#') {
            continue;
        }
        let mut rest = line;
        while let Some(at) = rest.find("cargo build") {
            let tail = &rest[at..];
            let end = tail
                .find(['&', ';', '|', ')', '"', '\''])
                .unwrap_or(tail.len());
            out.push(tail[..end].split_whitespace().collect::<Vec<_>>().join(" "));
            rest = &tail[end..];
        }
    }
    out
}

/// The exec form (`["a", "b"]`) of an instruction, after any `--option=value` flags.
fn exec_form(args: &str) -> Vec<String> {
    let start = args.find('[').expect("exec form");
    serde_json::from_str(&args[start..]).expect("exec form is a JSON array of strings")
}

#[test]
fn dockerfile_builds_with_the_command_ci_uses() {
    let df = dockerfile();
    let in_docker: Vec<String> = instructions(&df, "RUN")
        .iter()
        .flat_map(|i| cargo_build_commands(&i.args))
        .collect();
    assert_eq!(
        in_docker.len(),
        1,
        "one cargo build in the Dockerfile: {in_docker:?}"
    );
    let ci: BTreeSet<String> = cargo_build_commands(&read(".ci/run")).into_iter().collect();
    assert_eq!(
        ci,
        BTreeSet::from([in_docker[0].clone()]),
        ".ci/run and the Dockerfile must build the same way"
    );
    assert_eq!(in_docker[0], "cargo build --release --locked");
    // --locked needs a committed lock file next to Cargo.toml.
    assert!(repo_path("Cargo.lock").is_file());
    // The builder image is the official Rust image.
    let from = instructions(&df, "FROM");
    assert!(
        from[0].args.starts_with("rust:"),
        "builder: {}",
        from[0].args
    );
    assert!(from.len() >= 2, "a multi-stage build");
}

#[test]
fn dockerfile_port_user_and_entry_point_agree_with_the_binary() {
    let df = dockerfile();
    let port = default_port();
    let expose: Vec<&str> = instructions(&df, "EXPOSE")
        .iter()
        .flat_map(|i| i.args.split_whitespace())
        .collect();
    assert_eq!(expose, [format!("{port}").as_str()], "EXPOSE");

    let entry = instructions(&df, "ENTRYPOINT");
    assert_eq!(entry.len(), 1);
    let argv = exec_form(&entry[0].args);
    // The entry point runs the binary the runtime stage copied in.
    let copied = instructions(&df, "COPY")
        .iter()
        .filter(|i| i.args.starts_with("--from="))
        .any(|i| i.args.split_whitespace().last() == Some(argv[0].as_str()));
    assert!(copied, "{} is not copied from the builder", argv[0]);
    let args: Vec<&str> = argv[1..].iter().map(String::as_str).collect();
    match parse_cli(&args).expect("the entry point parses").command {
        Command::Serve(a) => {
            assert_eq!(a.addr.port(), port, "entry point port");
            // Inside a container loopback is unreachable from outside.
            assert!(a.addr.ip().is_unspecified(), "listen on all interfaces");
        }
        other => panic!("the entry point must serve, not {other:?}"),
    }

    // Runs as a fixed non-root uid, the same one the Deployment asserts.
    let user = instructions(&df, "USER");
    let uid: u32 = user
        .last()
        .expect("a USER")
        .args
        .split(':')
        .next()
        .unwrap()
        .parse()
        .expect("numeric uid");
    assert_ne!(uid, 0, "not root");
    let deployment = manifest("Deployment");
    let sc = &deployment["spec"]["template"]["spec"]["securityContext"];
    assert_eq!(sc["runAsUser"], uid, "the Deployment's uid");
    assert_eq!(sc["runAsNonRoot"], true);

    // Every ENV the image sets is one `tacit serve` understands.
    for env in instructions(&df, "ENV") {
        let (k, v) = env.args.split_once('=').expect("ENV NAME=value");
        assert_serve_env(k, v, "Dockerfile ENV");
    }
}

/// The bash script of the HEALTHCHECK, with the port it asks.
fn health_check_script() -> String {
    let df = dockerfile();
    let hc = instructions(&df, "HEALTHCHECK");
    assert_eq!(hc.len(), 1);
    let argv = exec_form(&hc[0].args);
    assert_eq!(argv[..2], ["bash", "-c"], "health check runs bash");
    argv[2].clone()
}

#[test]
fn dockerfile_health_check_asks_healthz_on_the_default_port() {
    let script = health_check_script();
    let port = default_port();
    assert!(
        script.contains(&format!("/dev/tcp/127.0.0.1/{port} ")),
        "health check port: {script}"
    );
    let path = script
        .split("GET ")
        .nth(1)
        .and_then(|s| s.split_whitespace().next())
        .expect("a GET request line");
    assert_eq!(path, "/healthz");
    assert_open_get_route(path, "HEALTHCHECK");
}

/// Run the health-check script with bash against `port`.
async fn run_health_check(script: String, port: u16) -> bool {
    let script = script.replace(
        &format!("/dev/tcp/127.0.0.1/{} ", default_port()),
        &format!("/dev/tcp/127.0.0.1/{port} "),
    );
    // Blocking child process off the runtime's thread, so the server keeps answering.
    tokio::task::spawn_blocking(move || {
        std::process::Command::new("bash")
            .args(["-c", &script])
            .stderr(std::process::Stdio::null())
            .status()
            .expect("bash runs")
            .success()
    })
    .await
    .unwrap()
}

#[tokio::test]
async fn dockerfile_health_check_passes_against_a_live_server_and_fails_otherwise() {
    let script = health_check_script();
    let s = start_default().await;
    assert!(
        run_health_check(script.clone(), s.addr.port()).await,
        "health check fails against a healthy server"
    );
    // The same script asking a path that answers 404 must fail, so the check reads the
    // status line rather than merely connecting.
    let wrong = script.replace("GET /healthz ", "GET /no-such-route ");
    assert_ne!(wrong, script);
    assert!(!run_health_check(wrong, s.addr.port()).await);
    // And with nothing listening (the server stopped).
    let port = s.addr.port();
    s.shutdown().await.unwrap();
    assert!(!run_health_check(script, port).await);
}

// ---------------------------------------------------------------------------------------
// Kubernetes manifests.

/// Every YAML document under deploy/k8s, with the file it came from.
fn k8s_documents() -> Vec<(String, Value)> {
    let dir = repo_path("deploy/k8s");
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .expect("deploy/k8s")
        .map(|e| e.unwrap().path())
        .collect();
    files.sort();
    let mut docs = Vec::new();
    for f in files {
        let name = f.file_name().unwrap().to_str().unwrap().to_string();
        assert!(
            name.ends_with(".yaml"),
            "{name}: manifests are .yaml, nothing else lives in deploy/k8s"
        );
        let text = std::fs::read_to_string(&f).unwrap();
        for doc in serde_norway::Deserializer::from_str(&text) {
            let v = Value::deserialize(doc).unwrap_or_else(|e| panic!("{name}: {e}"));
            if !v.is_null() {
                docs.push((name.clone(), v));
            }
        }
    }
    docs
}

/// The one manifest of `kind`.
fn manifest(kind: &str) -> Value {
    let all: Vec<Value> = k8s_documents()
        .into_iter()
        .map(|(_, v)| v)
        .filter(|v| v["kind"] == kind)
        .collect();
    assert_eq!(all.len(), 1, "one {kind}");
    all.into_iter().next().unwrap()
}

fn container(deployment: &Value) -> &Value {
    let cs = deployment["spec"]["template"]["spec"]["containers"]
        .as_array()
        .expect("containers");
    assert_eq!(cs.len(), 1, "one container");
    &cs[0]
}

/// A probe or Service port, named or numbered, as the container port number it means.
fn resolve_port(port: &Value, container: &Value) -> u64 {
    match port {
        Value::Number(n) => n.as_u64().unwrap(),
        Value::String(name) => container["ports"]
            .as_array()
            .unwrap()
            .iter()
            .find(|p| p["name"] == name.as_str())
            .unwrap_or_else(|| panic!("no container port named {name}"))["containerPort"]
            .as_u64()
            .unwrap(),
        other => panic!("not a port: {other}"),
    }
}

/// `labels` holds every pair of `selector`.
fn assert_selects(selector: &Value, labels: &Value, what: &str) {
    let sel = selector.as_object().expect("a selector");
    assert!(!sel.is_empty(), "{what}: empty selector");
    for (k, v) in sel {
        assert_eq!(
            &labels[k], v,
            "{what}: selector {k} does not match the pods"
        );
    }
}

#[test]
fn manifests_parse_and_the_kustomization_lists_them_all() {
    let docs = k8s_documents();
    let kinds: BTreeSet<&str> = docs
        .iter()
        .map(|(_, d)| d["kind"].as_str().unwrap())
        .collect();
    for kind in [
        "Deployment",
        "Service",
        "HorizontalPodAutoscaler",
        "PodDisruptionBudget",
        "Secret",
        "Kustomization",
    ] {
        assert!(kinds.contains(kind), "no {kind} in deploy/k8s");
    }
    for (file, d) in &docs {
        assert!(d["apiVersion"].is_string(), "{file}: apiVersion");
        if d["kind"] != "Kustomization" {
            assert!(d["metadata"]["name"].is_string(), "{file}: metadata.name");
        }
    }
    let kust = manifest("Kustomization");
    let listed: BTreeSet<String> = kust["resources"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r.as_str().unwrap().to_string())
        .collect();
    let files: BTreeSet<String> = docs
        .iter()
        .filter(|(_, d)| d["kind"] != "Kustomization")
        .map(|(f, _)| f.clone())
        .collect();
    assert_eq!(listed, files, "kustomization resources vs files");
}

#[test]
fn probes_hit_open_routes_on_the_binarys_port() {
    let d = manifest("Deployment");
    let c = container(&d);
    let port = u64::from(default_port());
    let ports = c["ports"].as_array().unwrap();
    assert_eq!(ports.len(), 1);
    assert_eq!(ports[0]["containerPort"], port, "containerPort");
    for (probe, path) in [("readinessProbe", "/readyz"), ("livenessProbe", "/healthz")] {
        let get = &c[probe]["httpGet"];
        assert_eq!(get["path"], path, "{probe}");
        assert_open_get_route(path, probe);
        assert_eq!(resolve_port(&get["port"], c), port, "{probe} port");
    }
    // Prometheus scrape hints name the metrics route on the same port.
    let ann = &d["spec"]["template"]["metadata"]["annotations"];
    assert_eq!(ann["prometheus.io/port"], port.to_string());
    let metrics = ann["prometheus.io/path"].as_str().unwrap();
    assert_open_get_route(metrics, "prometheus.io/path");

    // The Service forwards to the same container port, and selects these pods.
    let svc = manifest("Service");
    let labels = &d["spec"]["template"]["metadata"]["labels"];
    assert_selects(&svc["spec"]["selector"], labels, "Service");
    for p in svc["spec"]["ports"].as_array().unwrap() {
        assert_eq!(
            resolve_port(&p["targetPort"], c),
            port,
            "Service targetPort"
        );
    }
}

#[test]
fn image_is_the_same_everywhere() {
    let want = image();
    let mut seen = 0;
    for (file, d) in k8s_documents() {
        let spec = &d["spec"]["template"]["spec"];
        for key in ["containers", "initContainers"] {
            for c in spec[key].as_array().into_iter().flatten() {
                assert_eq!(c["image"], want.as_str(), "{file}: {}", c["name"]);
                seen += 1;
            }
        }
    }
    assert_eq!(seen, 1, "one container image in the manifests");
    let kust = manifest("Kustomization");
    let images = kust["images"].as_array().unwrap();
    assert_eq!(images.len(), 1);
    assert_eq!(images[0]["name"], IMAGE_REPO);
    assert_eq!(images[0]["newTag"], env!("CARGO_PKG_VERSION"));
    // The build and run lines at the top of the Dockerfile tag and run the same image.
    let df = read("deploy/Dockerfile");
    let tagged: Vec<&str> = df
        .lines()
        .filter(|l| l.contains("docker build"))
        .filter_map(|l| l.split(" -t ").nth(1)?.split_whitespace().next())
        .collect();
    assert_eq!(tagged, [want.as_str()], "docker build -t in the Dockerfile");
    let run_line = df
        .lines()
        .find(|l| l.contains("docker run"))
        .expect("a docker run line");
    assert!(run_line.trim_end().ends_with(&want), "{run_line}");
}

#[test]
fn autoscaler_disruption_budget_and_resources_fit_together() {
    let d = manifest("Deployment");
    let c = container(&d);
    let labels = &d["spec"]["template"]["metadata"]["labels"];
    assert_selects(&d["spec"]["selector"]["matchLabels"], labels, "Deployment");

    // Utilisation targets are relative to the CPU request, so it must be set.
    for kind in ["requests", "limits"] {
        for res in ["cpu", "memory"] {
            assert!(
                c["resources"][kind][res].is_string(),
                "resources.{kind}.{res}"
            );
        }
    }
    let hpa = manifest("HorizontalPodAutoscaler");
    let target = &hpa["spec"]["scaleTargetRef"];
    assert_eq!(target["kind"], "Deployment");
    assert_eq!(target["name"], d["metadata"]["name"]);
    let metrics = hpa["spec"]["metrics"].as_array().unwrap();
    assert!(metrics
        .iter()
        .any(|m| m["type"] == "Resource" && m["resource"]["name"] == "cpu"));
    let min = hpa["spec"]["minReplicas"].as_u64().unwrap();
    assert!(min >= 2, "one replica is no high availability");
    assert!(hpa["spec"]["maxReplicas"].as_u64().unwrap() > min);

    let pdb = manifest("PodDisruptionBudget");
    assert_selects(
        &pdb["spec"]["selector"]["matchLabels"],
        labels,
        "PodDisruptionBudget",
    );
    // A budget as large as the smallest replica count would block every node drain.
    let keep = pdb["spec"]["minAvailable"]
        .as_u64()
        .expect("minAvailable as a number");
    assert!(
        keep >= 1 && keep < min,
        "minAvailable {keep} vs minReplicas {min}"
    );
}

#[test]
fn api_keys_come_from_the_secret_and_every_variable_is_real() {
    let d = manifest("Deployment");
    let c = container(&d);
    let pod = &d["spec"]["template"]["spec"];
    let env: BTreeMap<String, String> = c["env"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| {
            let name = e["name"].as_str().unwrap().to_string();
            let value = e["value"]
                .as_str()
                .expect("plain string values")
                .to_string();
            (name, value)
        })
        .collect();
    for (k, v) in &env {
        assert_serve_env(k, v, "Deployment env");
    }
    // TACIT_API_KEYS_FILE points into a mounted Secret that holds that key.
    let file = Path::new(&env["TACIT_API_KEYS_FILE"]);
    let mount = c["volumeMounts"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| file.starts_with(m["mountPath"].as_str().unwrap()))
        .expect("the key file is under a volume mount");
    assert_eq!(mount["readOnly"], true);
    let rel = file
        .strip_prefix(mount["mountPath"].as_str().unwrap())
        .unwrap()
        .to_str()
        .unwrap();
    let volume = pod["volumes"]
        .as_array()
        .unwrap()
        .iter()
        .find(|v| v["name"] == mount["name"])
        .expect("the mounted volume");
    let item = volume["secret"]["items"]
        .as_array()
        .unwrap()
        .iter()
        .find(|i| i["path"] == rel)
        .expect("a Secret item at the key file's path");
    let secret = manifest("Secret");
    assert_eq!(volume["secret"]["secretName"], secret["metadata"]["name"]);
    let key = item["key"].as_str().unwrap();
    assert!(
        secret["stringData"][key].is_string() || secret["data"][key].is_string(),
        "the Secret has no {key}"
    );

    // Drain order: the preStop pause and the server's grace both fit in the pod's grace.
    let pause: f64 = c["lifecycle"]["preStop"]["exec"]["command"][1]
        .as_str()
        .unwrap()
        .parse()
        .unwrap();
    let grace: f64 = env["TACIT_SHUTDOWN_GRACE_SECS"].parse().unwrap();
    let pod_grace = pod["terminationGracePeriodSeconds"].as_f64().unwrap();
    assert!(
        pause + grace < pod_grace,
        "{pause} + {grace} >= {pod_grace}"
    );
    // The service writes nothing to disk.
    assert_eq!(c["securityContext"]["readOnlyRootFilesystem"], true);
    assert_eq!(c["securityContext"]["allowPrivilegeEscalation"], false);
}

// ---------------------------------------------------------------------------------------
// systemd unit.

/// `key -> values` of one section of a unit file (keys may repeat).
fn unit_section(text: &str, section: &str) -> BTreeMap<String, Vec<String>> {
    let mut out: BTreeMap<String, Vec<String>> = BTreeMap::new();
    let mut current = String::new();
    for line in text.lines() {
        let t = line.trim();
        if t.is_empty() || t.starts_with('#') || t.starts_with(';') {
            continue;
        }
        if t.starts_with('[') {
            current = t.trim_matches(['[', ']']).to_string();
            continue;
        }
        if current == section {
            let (k, v) = t.split_once('=').expect("key=value");
            out.entry(k.trim().to_string())
                .or_default()
                .push(v.trim().to_string());
        }
    }
    out
}

#[test]
fn systemd_unit_runs_a_real_subcommand_with_real_variables() {
    let text = read("deploy/systemd/tacit.service");
    let svc = unit_section(&text, "Service");
    let exec = &svc["ExecStart"];
    assert_eq!(exec.len(), 1);
    let words: Vec<&str> = exec[0].split_whitespace().collect();
    // The same install path as the container image's entry point.
    let df = dockerfile();
    let entry = exec_form(&instructions(&df, "ENTRYPOINT")[0].args);
    assert_eq!(words[0], entry[0], "binary path");
    let cli = parse_cli(&words[1..]).expect("ExecStart parses");
    assert!(matches!(cli.command, Command::Serve(_)), "ExecStart serves");

    let mut env = BTreeMap::new();
    for line in &svc["Environment"] {
        for pair in line.split_whitespace() {
            let (k, v) = pair.split_once('=').expect("NAME=value");
            assert_serve_env(k, v, "systemd Environment");
            env.insert(k.to_string(), v.to_string());
        }
    }
    match assert_serve_env("TACIT_ADDR", &env["TACIT_ADDR"], "TACIT_ADDR").command {
        Command::Serve(a) => assert_eq!(
            a.addr,
            default_addr(),
            "the unit listens where the binary would"
        ),
        other => panic!("{other:?}"),
    }
    // systemd waits longer than the server's own drain before SIGKILL.
    let grace: f64 = env["TACIT_SHUTDOWN_GRACE_SECS"].parse().unwrap();
    let stop: f64 = svc["TimeoutStopSec"][0]
        .trim_end_matches('s')
        .parse()
        .unwrap();
    assert!(stop > grace, "TimeoutStopSec {stop} <= grace {grace}");

    for (k, v) in [
        ("DynamicUser", "yes"),
        ("NoNewPrivileges", "yes"),
        ("ProtectSystem", "strict"),
        ("ProtectHome", "yes"),
        ("PrivateTmp", "yes"),
        ("MemoryDenyWriteExecute", "yes"),
    ] {
        assert_eq!(svc.get(k).map(|v| v[0].as_str()), Some(v), "{k}");
    }
    let install = unit_section(&text, "Install");
    assert_eq!(install["WantedBy"], ["multi-user.target"]);
}
