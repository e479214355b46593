//! The `tacit` command line: `serve` the HTTP API, or `run`, `check` and `simulate`
//! request files without a server. The same job functions answer both, so a file that
//! works here works as a request body, with the same errors as readable text.

use crate::config::Limits;
use crate::http::{self, ApiKeys, AppState, ServerConfig};
use crate::job::{self, Stop, StreamSession};
use crate::problem::Problem;
use clap::{Args, Parser, Subcommand, ValueEnum};
use std::io::{BufRead, BufReader, IsTerminal, Read, Write};
use std::net::SocketAddr;
use std::process::ExitCode;
use std::time::{Duration, Instant};

/// Recover unmeasured plant states with extended, unscented and ensemble Kalman filters.
#[derive(Debug, Parser)]
#[command(name = "tacit", version, about)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// The subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Serve the HTTP API.
    Serve(ServeArgs),
    /// Run an estimate request (JSON as for POST /v1/estimate, or NDJSON as for the
    /// stream endpoint) and print the answer.
    Run(RunArgs),
    /// Check a model (JSON as for POST /v1/check): dimensions and observability.
    Check(FileArgs),
    /// Simulate truth and readings (JSON as for POST /v1/simulate).
    Simulate(FileArgs),
    /// Fit noise settings and parameters to the readings of a request (JSON as for POST
    /// /v1/calibrate) and print the answer; a progress bar on standard error when it is a
    /// terminal.
    Calibrate(FileArgs),
    /// Build a model from recorded history (JSON as for POST /v1/identify) and print
    /// the answer: its `model` is a model section the other commands accept.
    Identify(FileArgs),
    /// Run the invented demo plants (crane, water tower, kiln) end to end against the
    /// service started in-process on a free loopback port, and print what was recovered.
    Demo(DemoArgs),
}

/// Limits on what one request may ask; unset flags keep the built-in defaults that
/// `GET /v1/info` reports.
#[derive(Debug, Clone, Default, Args)]
pub struct LimitArgs {
    /// Largest request body, bytes.
    #[arg(long, env = "TACIT_MAX_BODY_BYTES")]
    pub max_body_bytes: Option<usize>,
    /// Largest NDJSON line, bytes.
    #[arg(long, env = "TACIT_MAX_LINE_BYTES")]
    pub max_line_bytes: Option<usize>,
    /// Most states, estimated parameters included.
    #[arg(long, env = "TACIT_MAX_STATES")]
    pub max_states: Option<usize>,
    /// Most sensors in one model.
    #[arg(long, env = "TACIT_MAX_SENSORS")]
    pub max_sensors: Option<usize>,
    /// Most ensemble members.
    #[arg(long, env = "TACIT_MAX_MEMBERS")]
    pub max_members: Option<usize>,
    /// Most measurement lines in one batch request.
    #[arg(long, env = "TACIT_MAX_LINES")]
    pub max_lines: Option<usize>,
    /// The v1 name of `--max-lines`: kept hidden only to be refused with the new name,
    /// so a stale flag or environment variable fails loudly instead of being ignored.
    #[arg(long, env = "TACIT_MAX_READINGS", hide = true)]
    pub max_readings: Option<usize>,
    /// Most simulated times in one request.
    #[arg(long, env = "TACIT_MAX_SIM_TIMES")]
    pub max_sim_times: Option<usize>,
    /// Longest formula, characters.
    #[arg(long, env = "TACIT_MAX_FORMULA_LEN")]
    pub max_formula_len: Option<usize>,
    /// Deepest formula nesting.
    #[arg(long, env = "TACIT_MAX_FORMULA_DEPTH")]
    pub max_formula_depth: Option<usize>,
    /// Most fixed-size steps one gap may need (grid steps of a discrete model, or steps of
    /// integration.fixed_step); a longer gap is refused with 422 before stepping.
    #[arg(long, env = "TACIT_MAX_GAP_STEPS")]
    pub max_gap_steps: Option<u64>,
    /// Compute budget of one request, seconds, counted from its arrival; 0 for none (a
    /// request whose client goes away is still stopped at once).
    #[arg(long, env = "TACIT_DEADLINE_SECS")]
    pub deadline_secs: Option<f64>,
    /// Most requests computing at once; more are answered 503 with Retry-After.
    #[arg(long, env = "TACIT_MAX_CONCURRENCY")]
    pub max_concurrency: Option<usize>,
    /// Most memory one request may need, bytes, estimated before it runs; more is refused
    /// with 413. Default: a quarter of the machine's memory (or of its cgroup limit).
    #[arg(long, env = "TACIT_MAX_REQUEST_BYTES")]
    pub max_request_bytes: Option<u64>,
}

impl LimitArgs {
    /// The limits in force: the defaults with every given flag applied.
    pub fn to_limits(&self) -> Result<Limits, String> {
        if self.max_readings.is_some() {
            return Err(
                "--max-readings (TACIT_MAX_READINGS) was renamed --max-lines (TACIT_MAX_LINES)"
                    .into(),
            );
        }
        let mut l = Limits::default();
        macro_rules! set {
            ($($f:ident),*) => { $( if let Some(v) = self.$f { l.$f = v; } )* };
        }
        set!(
            max_body_bytes,
            max_line_bytes,
            max_states,
            max_sensors,
            max_members,
            max_lines,
            max_sim_times,
            max_formula_len,
            max_formula_depth,
            max_gap_steps,
            max_concurrency
        );
        if let Some(s) = self.deadline_secs {
            if !s.is_finite() || s < 0.0 {
                return Err("--deadline-secs must be a non-negative number".into());
            }
            l.deadline = (s > 0.0).then(|| Duration::from_secs_f64(s));
        }
        l.max_request_bytes = self
            .max_request_bytes
            .unwrap_or_else(crate::config::machine_request_bytes);
        Ok(l)
    }
}

/// Log line format.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum LogFormat {
    /// Human-readable lines.
    Text,
    /// One JSON object per line, for log collectors.
    Json,
}

/// `tacit serve`.
#[derive(Debug, Args)]
pub struct ServeArgs {
    /// Address to listen on.
    #[arg(long, env = "TACIT_ADDR", default_value = "127.0.0.1:8080")]
    pub addr: SocketAddr,
    /// Request limits.
    #[command(flatten)]
    pub limits: LimitArgs,
    /// Accepted API keys, comma-separated; when any key is configured, /v1/* needs
    /// `Authorization: Bearer KEY` (/healthz, /readyz and /metrics stay open).
    #[arg(long, env = "TACIT_API_KEYS", hide_env_values = true)]
    pub api_keys: Option<String>,
    /// File of accepted API keys, one per line (`#` starts a comment).
    #[arg(long, env = "TACIT_API_KEYS_FILE")]
    pub api_keys_file: Option<std::path::PathBuf>,
    /// Origins allowed by CORS, comma-separated (`*` for any); none by default.
    #[arg(long, env = "TACIT_CORS_ORIGINS", value_delimiter = ',')]
    pub cors_origins: Vec<String>,
    /// Log format.
    #[arg(long, env = "TACIT_LOG_FORMAT", value_enum, default_value = "text")]
    pub log_format: LogFormat,
    /// Seconds running requests may continue after SIGTERM or SIGINT.
    #[arg(long, env = "TACIT_SHUTDOWN_GRACE_SECS", default_value_t = 30.0)]
    pub shutdown_grace_secs: f64,
    /// Seconds a stream may stay silent between two lines before it is ended (with its
    /// last good posterior and a stream-idle error line).
    #[arg(long, env = "TACIT_STREAM_IDLE_SECS", default_value_t = 60.0)]
    pub stream_idle_secs: f64,
    /// Seconds a socket may wait for, or take to send, a request head (new connections
    /// and kept-alive ones between requests) before it is closed.
    #[arg(long, env = "TACIT_SOCKET_IDLE_SECS", default_value_t = 10.0)]
    pub socket_idle_secs: f64,
}

/// `tacit run`.
#[derive(Debug, Args)]
pub struct RunArgs {
    /// Request file, or `-` for standard input.
    pub file: String,
    /// Smooth the whole batch (as POST /v1/smooth) instead of filtering.
    #[arg(long)]
    pub smooth: bool,
    /// Readings from a historian CSV file (`-` for standard input): the request is then
    /// one JSON document without `measurements`, with a `csv` section saying how to read
    /// the file, as the `request` part of a multipart POST /v1/estimate.
    #[arg(long, value_name = "CSV")]
    pub readings: Option<String>,
    /// Request limits.
    #[command(flatten)]
    pub limits: LimitArgs,
}

/// `tacit check` and `tacit simulate`.
#[derive(Debug, Args)]
pub struct FileArgs {
    /// Request file, or `-` for standard input.
    pub file: String,
    /// Request limits.
    #[command(flatten)]
    pub limits: LimitArgs,
}

/// `tacit demo`.
#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Print the results as one JSON document.
    #[arg(long)]
    pub json: bool,
    /// Instead of running, rebuild each scenario's truth.json and measurements.json from
    /// the settings and seeds under DIR (default demo-data) with tacit's simulator.
    #[arg(long, value_name = "DIR", num_args = 0..=1, default_missing_value = "demo-data")]
    pub regenerate: Option<std::path::PathBuf>,
}

/// Why a command failed: a problem with the request, or with reading and writing.
#[derive(Debug)]
pub enum CliError {
    /// The request was refused, as the server would refuse it.
    Problem(Problem),
    /// Anything else (files, flags, the listener), already worded for people.
    Other(String),
}

impl std::fmt::Display for CliError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Self::Problem(p) => write!(f, "{p}"),
            Self::Other(s) => f.write_str(s),
        }
    }
}

impl From<Problem> for CliError {
    fn from(p: Problem) -> Self {
        Self::Problem(p)
    }
}

impl From<std::io::Error> for CliError {
    fn from(e: std::io::Error) -> Self {
        Self::Other(e.to_string())
    }
}

/// Parse the command line, run it, and turn the outcome into an exit code.
pub fn main() -> ExitCode {
    let cli = Cli::parse();
    match dispatch(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e}");
            ExitCode::FAILURE
        }
    }
}

/// Run one parsed command.
pub fn dispatch(cli: Cli) -> Result<(), CliError> {
    match cli.command {
        Command::Serve(a) => serve(a),
        Command::Run(a) => run(&a),
        Command::Check(a) => {
            let limits = a.limits.to_limits().map_err(CliError::Other)?;
            let body = read_all(&a.file)?;
            print_body(&job::check(&body, &limits, &Stop::within(limits.deadline))?.body)
        }
        Command::Simulate(a) => {
            let limits = a.limits.to_limits().map_err(CliError::Other)?;
            let body = read_all(&a.file)?;
            let stop = Stop::within(limits.deadline);
            print_body(&job::simulate(&body, &limits, &stop)?.body)
        }
        Command::Calibrate(a) => calibrate(&a),
        Command::Identify(a) => {
            let limits = a.limits.to_limits().map_err(CliError::Other)?;
            let body = read_all(&a.file)?;
            let stop = Stop::within(limits.deadline);
            print_body(&job::identify(&body, &limits, &stop)?.body)
        }
        Command::Demo(a) => demo(&a),
    }
}

/// `tacit calibrate FILE`: the job with a spinner showing the run count and the best
/// log-likelihood so far, on standard error when that is a terminal.
fn calibrate(a: &FileArgs) -> Result<(), CliError> {
    use std::io::IsTerminal;
    let limits = a.limits.to_limits().map_err(CliError::Other)?;
    let body = read_all(&a.file)?;
    let stop = Stop::within(limits.deadline);
    let bar = std::io::stderr().is_terminal().then(|| {
        let b = indicatif::ProgressBar::new_spinner();
        if let Ok(style) =
            indicatif::ProgressStyle::with_template("{spinner} {elapsed} run {pos}  {msg}")
        {
            b.set_style(style);
        }
        b.enable_steady_tick(Duration::from_millis(120));
        b
    });
    let best = std::sync::Mutex::new(f64::NEG_INFINITY);
    let progress = |k: u64, ll: Option<f64>| {
        let Some(b) = &bar else { return };
        if let (Some(ll), Ok(mut best)) = (ll, best.lock()) {
            if ll > *best {
                *best = ll;
                b.set_message(format!("best log-likelihood {ll:.6}"));
            }
        }
        b.set_position(k);
    };
    let done = job::calibrate(&body, &limits, &stop, &progress);
    if let Some(b) = &bar {
        b.finish_and_clear();
    }
    print_body(&done?.body)
}

/// The server configuration `serve` would use, keys and CORS included.
pub fn server_config(a: &ServeArgs) -> Result<ServerConfig, CliError> {
    let limits = a.limits.to_limits().map_err(CliError::Other)?;
    let mut keys = a
        .api_keys
        .as_deref()
        .map(ApiKeys::parse_list)
        .unwrap_or_default();
    if let Some(path) = &a.api_keys_file {
        let text = std::fs::read_to_string(path).map_err(|e| {
            CliError::Other(format!("cannot read the key file {}: {e}", path.display()))
        })?;
        keys.extend(ApiKeys::parse_lines(&text));
    }
    if !a.shutdown_grace_secs.is_finite() || a.shutdown_grace_secs < 0.0 {
        return Err(CliError::Other(
            "--shutdown-grace-secs must be a non-negative number".into(),
        ));
    }
    for (flag, v) in [
        ("--stream-idle-secs", a.stream_idle_secs),
        ("--socket-idle-secs", a.socket_idle_secs),
    ] {
        if !v.is_finite() || v <= 0.0 || v > 1e9 {
            return Err(CliError::Other(format!(
                "{flag} must be a positive number of seconds"
            )));
        }
    }
    Ok(ServerConfig {
        limits,
        api_keys: keys,
        cors_origins: a
            .cors_origins
            .iter()
            .map(|o| o.trim().to_string())
            .filter(|o| !o.is_empty())
            .collect(),
        shutdown_grace: Duration::from_secs_f64(a.shutdown_grace_secs),
        stream_idle: Duration::from_secs_f64(a.stream_idle_secs),
        socket_idle: Duration::from_secs_f64(a.socket_idle_secs),
        ..ServerConfig::default()
    })
}

fn init_logging(format: LogFormat) {
    use std::io::IsTerminal;
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    let colour = format == LogFormat::Text
        && colour_wanted(
            std::io::stderr().is_terminal(),
            std::env::var_os("NO_COLOR").as_deref(),
        );
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(colour)
        .with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Text => builder.try_init(),
        LogFormat::Json => builder.json().try_init(),
    };
}

/// Colour codes only for a person at a terminal: a file or a log collector would keep
/// them as noise. `NO_COLOR` set to anything but the empty string turns colour off
/// (the no-color.org convention).
fn colour_wanted(stderr_is_terminal: bool, no_color: Option<&std::ffi::OsStr>) -> bool {
    stderr_is_terminal && no_color.is_none_or(|v| v.is_empty())
}

fn serve(a: ServeArgs) -> Result<(), CliError> {
    init_logging(a.log_format);
    let config = server_config(&a)?;
    let mut rt = tokio::runtime::Builder::new_multi_thread();
    // The executor only reads requests and writes answers; the filters run on the compute
    // lane's threads (one per core). One executor thread per core as well would make four
    // busy threads take turns on two cores: with half as many, a two-core machine served
    // ~18 % more single-step requests with less CPU each. TOKIO_WORKER_THREADS still
    // overrides this.
    if std::env::var_os("TOKIO_WORKER_THREADS").is_none() {
        rt.worker_threads(io_threads());
    }
    let rt = rt.enable_all().build()?;
    let served = rt.block_on(async move {
        let listener = tokio::net::TcpListener::bind(a.addr)
            .await
            .map_err(|e| CliError::Other(format!("cannot listen on {}: {e}", a.addr)))?;
        let local = listener.local_addr()?;
        if config.api_keys.is_empty() {
            tracing::warn!(
                "no API keys configured: /v1/* is open to anyone who can reach {local}; set TACIT_API_KEYS or TACIT_API_KEYS_FILE to require keys"
            );
        } else {
            tracing::info!(keys = config.api_keys.len(), "API keys required on /v1/*");
        }
        tracing::info!(addr = %local, limits = ?config.limits, cors = ?config.cors_origins, "tacit {} listening", env!("CARGO_PKG_VERSION"));
        tracing::info!(page = %format!("http://{local}/"), "open the page in a browser");
        let state = AppState::new(config);
        http::serve(listener, state, http::shutdown_signal()).await?;
        tracing::info!("stopped");
        Ok(())
    });
    // Jobs still computing were abandoned when the grace time ended (and logged): exit
    // now rather than wait for their threads, which dropping the runtime would do.
    rt.shutdown_background();
    served
}

/// Executor threads: half the cores, at least one.
fn io_threads() -> usize {
    std::thread::available_parallelism().map_or(1, |n| (n.get() / 2).max(1))
}

fn demo(a: &DemoArgs) -> Result<(), CliError> {
    if let Some(dir) = &a.regenerate {
        for p in crate::demo::regenerate(dir).map_err(CliError::Other)? {
            println!("wrote {}", p.display());
        }
        println!("rebuild tacit to embed the new files in `tacit demo`");
        return Ok(());
    }
    let reports = crate::demo::run().map_err(CliError::Other)?;
    if a.json {
        let text = serde_json::to_vec_pretty(&crate::demo::to_json(&reports))
            .map_err(|e| CliError::Other(e.to_string()))?;
        print_body(&text)
    } else {
        let mut out = std::io::stdout().lock();
        out.write_all(crate::demo::render(&reports).as_bytes())?;
        out.flush()?;
        Ok(())
    }
}

/// An input file (or standard input) behind a buffer whose fill level can be seen.
type Input = BufReader<Box<dyn Read>>;

fn open(file: &str) -> Result<Input, CliError> {
    let inner: Box<dyn Read> = if file == "-" {
        Box::new(std::io::stdin().lock())
    } else {
        Box::new(
            std::fs::File::open(file)
                .map_err(|e| CliError::Other(format!("cannot open {file}: {e}")))?,
        )
    };
    Ok(BufReader::with_capacity(1 << 16, inner))
}

fn read_all(file: &str) -> Result<Vec<u8>, CliError> {
    let mut buf = Vec::new();
    open(file)?.read_to_end(&mut buf)?;
    Ok(buf)
}

fn print_body(body: &[u8]) -> Result<(), CliError> {
    print_pieces(std::slice::from_ref(&body))
}

/// An answer written in pieces (a large batch's), one after the other, then a newline.
fn print_pieces<B: AsRef<[u8]>>(parts: &[B]) -> Result<(), CliError> {
    let mut out = std::io::stdout().lock();
    for p in parts {
        out.write_all(p.as_ref())?;
    }
    out.write_all(b"\n")?;
    out.flush()?;
    Ok(())
}

/// What the first line of a `run` input says it is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum InputKind {
    /// One JSON document (as for `POST /v1/estimate`), possibly over many lines.
    Batch,
    /// NDJSON: this line is the stream header; readings follow one per line.
    Stream,
}

/// Decide from the first non-blank line: a complete JSON object without
/// `measurements` is a stream header; anything else (a batch on one line, or the first
/// line of a pretty-printed document) is read whole as a batch.
pub fn classify(first_line: &[u8]) -> InputKind {
    #[derive(serde::Deserialize)]
    struct Probe {
        measurements: Option<serde::de::IgnoredAny>,
    }
    match serde_json::from_slice::<Probe>(first_line) {
        Ok(Probe { measurements: None }) => InputKind::Stream,
        _ => InputKind::Batch,
    }
}

fn run(a: &RunArgs) -> Result<(), CliError> {
    let limits = a.limits.to_limits().map_err(CliError::Other)?;
    if let Some(csv) = &a.readings {
        if csv == "-" && a.file == "-" {
            return Err(CliError::Other(
                "the request and the readings cannot both come from standard input".into(),
            ));
        }
        let (mut request, mut readings) = (Vec::new(), Vec::new());
        open(&a.file)?.read_to_end(&mut request)?;
        open(csv)?.read_to_end(&mut readings)?;
        let stop = Stop::within(limits.deadline);
        let done = job::batch_csv(&request, &readings, &limits, &stop, a.smooth)?;
        return print_pieces(&done.parts);
    }
    let mut input = open(&a.file)?;
    let mut first = Vec::new();
    let mut line_no = 0u64;
    loop {
        first.clear();
        if input.read_until(b'\n', &mut first)? == 0 {
            break;
        }
        line_no += 1;
        if !first.iter().all(u8::is_ascii_whitespace) {
            break;
        }
    }
    let stop = Stop::within(limits.deadline);
    match classify(&first) {
        InputKind::Batch => {
            input.read_to_end(&mut first)?;
            let done = if a.smooth {
                job::smooth_pieces(&first, &limits, &stop)?
            } else {
                job::estimate_pieces(&first, &limits, &stop)?
            };
            print_pieces(&done.parts)
        }
        InputKind::Stream if a.smooth => Err(CliError::Other(
            "--smooth needs the whole batch as one JSON document (as for POST /v1/smooth), not NDJSON".into(),
        )),
        InputKind::Stream => run_stream(&first, line_no, input, &limits),
    }
}

/// Feed an NDJSON file through a stream session, writing each answer line as it comes.
fn run_stream(
    header: &[u8],
    header_line: u64,
    mut input: Input,
    limits: &Limits,
) -> Result<(), CliError> {
    let mut session = StreamSession::start(header, limits, &Stop::never())?;
    let stdout = std::io::stdout();
    let mut out = std::io::BufWriter::with_capacity(1 << 16, stdout.lock());
    let mut buf = Vec::with_capacity(1 << 16);
    let mut line = Vec::new();
    let mut line_no = header_line;
    let mut progress = Progress::new(std::io::stderr().is_terminal());
    loop {
        line.clear();
        let n = (&mut input)
            .take(limits.max_line_bytes as u64 + 2)
            .read_until(b'\n', &mut line)?;
        if n == 0 {
            break;
        }
        line_no += 1;
        if line.last() != Some(&b'\n') && n > limits.max_line_bytes {
            return Err(CliError::Other(format!(
                "line {line_no} is longer than the limit of {} bytes",
                limits.max_line_bytes
            )));
        }
        let text = trim_line(&line);
        if text.iter().all(u8::is_ascii_whitespace) {
            continue;
        }
        buf.clear();
        let pushed = session.push(text, line_no, &mut buf);
        out.write_all(&buf)?;
        if let Err(p) = pushed {
            out.flush()?;
            progress.clear();
            return Err(p.into());
        }
        // Flush when no more input is buffered, so a live pipe sees each answer at once
        // while a file is written in large blocks.
        if input.buffer().is_empty() {
            out.flush()?;
        }
        progress.tick(line_no);
    }
    buf.clear();
    let finished = session.finish(&mut buf);
    out.write_all(&buf)?;
    out.flush()?;
    progress.clear();
    finished.map(|_| ()).map_err(Into::into)
}

fn trim_line(line: &[u8]) -> &[u8] {
    let mut l = line;
    while let [rest @ .., b'\n' | b'\r'] = l {
        l = rest;
    }
    l
}

/// A one-line counter on stderr, redrawn at most five times a second, only on a terminal.
struct Progress {
    on: bool,
    last: Instant,
    drawn: bool,
}

impl Progress {
    fn new(on: bool) -> Self {
        Self {
            on,
            last: Instant::now(),
            drawn: false,
        }
    }

    fn tick(&mut self, line_no: u64) {
        if self.on && self.last.elapsed() >= Duration::from_millis(200) {
            self.last = Instant::now();
            self.drawn = true;
            eprint!("\r{line_no} lines read");
        }
    }

    fn clear(&mut self) {
        if self.drawn {
            eprint!("\r\x1b[K");
            self.drawn = false;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn classify_tells_a_stream_header_from_a_batch() {
        assert_eq!(
            classify(br#"{"model": {}, "filter": {"method": "ekf"}, "prior": {}}"#),
            InputKind::Stream
        );
        assert_eq!(
            classify(br#"{"model": {}, "measurements": [{"t": 0}]}"#),
            InputKind::Batch
        );
        // The first line of a pretty-printed document is not complete JSON.
        assert_eq!(classify(b"{\n"), InputKind::Batch);
        assert_eq!(classify(b""), InputKind::Batch);
    }

    #[test]
    fn limit_flags_override_only_what_they_name() {
        let args = LimitArgs {
            max_states: Some(8),
            deadline_secs: Some(0.0),
            ..LimitArgs::default()
        };
        let l = args.to_limits().unwrap();
        assert_eq!(l.max_states, 8);
        assert_eq!(l.deadline, None);
        assert_eq!(l.max_members, Limits::default().max_members);
        assert_eq!(l.max_request_bytes, crate::config::machine_request_bytes());
        let set = LimitArgs {
            max_request_bytes: Some(12345),
            ..LimitArgs::default()
        };
        assert_eq!(set.to_limits().unwrap().max_request_bytes, 12345);
        let bad = LimitArgs {
            deadline_secs: Some(-1.0),
            ..LimitArgs::default()
        };
        assert!(bad.to_limits().is_err());
        let old = LimitArgs {
            max_readings: Some(10),
            ..LimitArgs::default()
        };
        let msg = old.to_limits().unwrap_err();
        assert!(msg.contains("renamed --max-lines"), "{msg}");
    }

    #[test]
    fn colour_only_on_a_terminal_and_never_under_no_color() {
        use std::ffi::OsStr;
        // no-color.org: "when present and not an empty string" NO_COLOR disables colour.
        assert!(colour_wanted(true, None));
        assert!(colour_wanted(true, Some(OsStr::new(""))));
        assert!(!colour_wanted(true, Some(OsStr::new("1"))));
        assert!(!colour_wanted(false, None));
        assert!(!colour_wanted(false, Some(OsStr::new(""))));
    }

    #[test]
    fn cli_definition_is_consistent() {
        use clap::CommandFactory;
        Cli::command().debug_assert();
    }
}
