//! The `anomark` binary: parses arguments, calls [`anomark::run`], prints the
//! outcome or the error, and picks the exit code. Nothing else.

use std::io::Write;
use std::process::ExitCode;

// polars allocates many short-lived buffers; mimalloc serves them faster than
// the system allocator (measured in the benchmark, see the README).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

use clap::Parser;

/// Turns transparent huge pages off for this process (Linux), unless
/// `ANOMARK_HUGE_PAGES` is set. anomark writes its large buffers once and
/// reads them a few times; on the benchmark machine (a 2-vCPU virtual
/// machine) faulting them in as 2 MiB pages cost 0.5 to 1.5 s of kernel time
/// per million-row run against about 0.2 s with 4 KiB pages (README,
/// Benchmarks).
#[cfg(target_os = "linux")]
fn page_policy() {
    if std::env::var_os("ANOMARK_HUGE_PAGES").is_none() {
        // SAFETY: PR_SET_THP_DISABLE takes integer arguments only and changes
        // nothing but this process's page-size policy; a failure (an old
        // kernel) leaves the policy as it was, which is harmless.
        unsafe {
            libc::prctl(libc::PR_SET_THP_DISABLE, 1, 0, 0, 0);
        }
    }
}

#[cfg(not(target_os = "linux"))]
fn page_policy() {}

/// Ends the process with `code` once everything is written (stdout flushed,
/// the run directory fsynced and renamed, stderr unbuffered). On Linux the
/// C library's exit handlers are skipped: the allocator's handler hands every
/// freed page back to the kernel one range at a time, about 30 ms after a
/// million-row run, for memory the kernel frees at exit anyway (README,
/// Benchmarks). Elsewhere the process returns as usual.
fn exit_now(code: u8) -> ExitCode {
    #[cfg(target_os = "linux")]
    {
        // SAFETY: `_exit` ends the process at once; nothing of this process
        // is left to flush: stdout was flushed above, stderr is unbuffered,
        // and every output file was synced and closed before `run` returned.
        unsafe { libc::_exit(i32::from(code)) }
    }
    #[cfg(not(target_os = "linux"))]
    ExitCode::from(code)
}

fn main() -> ExitCode {
    anomark::progress::start_clock();
    // First, before any thread starts: SIGINT and SIGTERM remove anomark's
    // own temporaries.
    anomark::cleanup::install();
    page_policy();
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
            drop(out);
            exit_now(outcome.code as u8)
        }
        Err(e) => {
            eprintln!("anomark: {e}");
            ExitCode::from(e.code() as u8)
        }
    }
}
