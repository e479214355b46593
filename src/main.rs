//! The `tacit` binary: serve the HTTP API or run requests from files (see [`tacit::cli`]).

fn main() -> std::process::ExitCode {
    tacit::cli::main()
}
