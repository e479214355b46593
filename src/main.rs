//! The `tacit` binary: serve the HTTP API or run requests from files.

fn main() {
    println!("tacit {}", env!("CARGO_PKG_VERSION"));
}
