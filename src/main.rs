//! The `anomark` binary: parses arguments, calls [`anomark::run`], prints the
//! outcome or the error, and picks the exit code. Nothing else.

use std::io::Write;
use std::process::ExitCode;

// polars allocates many short-lived buffers; mimalloc serves them faster than
// the system allocator (measured in the benchmark, see the README).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

use clap::Parser;

fn main() -> ExitCode {
    let args = anomark::cli::Args::parse();
    let request = anomark::Request::from(args);
    match anomark::run(&request) {
        Ok(outcome) => {
            for w in &outcome.warnings {
                eprintln!("anomark: warning: {w}");
            }
            // A closed pipe (`anomark schema | head`) is not an error worth a message.
            let mut out = std::io::stdout().lock();
            let _ = out.write_all(outcome.stdout.as_bytes());
            let _ = out.flush();
            ExitCode::from(outcome.code as u8)
        }
        Err(e) => {
            eprintln!("anomark: {e}");
            ExitCode::from(e.code() as u8)
        }
    }
}
