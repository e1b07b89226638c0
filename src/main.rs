//! The varpost binary: parse, run, and turn the result into the process's exit code (only through
//! `ExitCode::code` and `Error::exit_code`) and a readable error with its causes.

use std::io::Write;

use varpost::error::ExitCode;

fn main() {
    // Output piped into a reader that stops early (`varpost check | head`): end quietly, as other
    // command-line tools do, instead of failing on the write. A run cut off that way resumes like any
    // killed run.
    // SAFETY: resetting a signal's disposition to its default, before any thread is started.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
    let code = match varpost::cli::parse() {
        // Usage errors are bad input; --help and --version are done.
        Err(e) => {
            let _ = e.print();
            if e.use_stderr() {
                ExitCode::BadInput
            } else {
                ExitCode::Success
            }
        }
        Ok(cli) => match varpost::cli::run(cli) {
            Ok(code) => code,
            Err(e) => {
                print_error(&e);
                e.exit_code()
            }
        },
    };
    if let Some(p) = varpost::cli::unreported_panic() {
        let _ = writeln!(
            std::io::stderr(),
            "warning: internal error on a background thread (a defect of varpost; please report it): {p}"
        );
    }
    std::process::exit(code.code());
}

/// "error: MESSAGE", then each cause on its own line.
fn print_error(e: &varpost::Error) {
    let mut err = std::io::stderr().lock();
    let _ = writeln!(err, "error: {e}");
    let mut source = std::error::Error::source(e);
    while let Some(s) = source {
        let _ = writeln!(err, "  caused by: {s}");
        source = s.source();
    }
}
