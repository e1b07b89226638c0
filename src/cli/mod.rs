//! The command line: arguments ([`args`], checked as they are parsed by [`parse`]) → validated run
//! configurations → pipeline calls, one file per subcommand or group of them, the printing of their
//! results ([`print`]) and their progress ([`watch`]). Nothing here computes.
//!
//! [`run`] returns the exit code of a completed run, or the error that ended it; the binary turns
//! either into the process's exit code (README, "Exit codes"). A panic anywhere in a run becomes
//! [`Error::Internal`] ([`guard`]).

mod analysis;
pub mod args;
mod demo;
pub mod fault;
mod guard;
pub mod parse;
mod print;
mod report;
mod sample;
mod synth;
mod watch;

use clap::error::ErrorKind;
use clap::{CommandFactory, FromArgMatches};

pub use args::{Cli, Command};

use crate::config::ProblemSource;
use crate::error::{Error, ExitCode, Result};
use crate::output::progress::Progress;

/// Parses the process's arguments: every value checked, and adapter options refused without
/// `--adapter`. A `clap::Error` is a usage error to print (or the help or version text).
pub fn parse() -> std::result::Result<Cli, clap::Error> {
    parse_from(std::env::args_os())
}

/// Parses `args` (the program name first) as [`parse`] does.
pub fn parse_from<I, T>(args: I) -> std::result::Result<Cli, clap::Error>
where
    I: IntoIterator<Item = T>,
    T: Into<std::ffi::OsString> + Clone,
{
    let mut cmd = Cli::command();
    let matches = cmd.try_get_matches_from_mut(args)?;
    args::check_adapter_options(&matches).map_err(|m| cmd.error(ErrorKind::ArgumentConflict, m))?;
    Cli::from_arg_matches(&matches).map_err(|e| e.format(&mut cmd))
}

/// Runs a parsed command line; returns the exit code of a completed run. Installs the panic hook of
/// [`guard`], so that a panic comes back as [`Error::Internal`] naming where it happened.
pub fn run(cli: Cli) -> Result<ExitCode> {
    guard::install_hook();
    let progress = Progress::choose(cli.log_format, cli.quiet);
    guard::catch(|| dispatch(cli.command, progress))
}

/// A panic on a thread that the run did not wait for, not reported by [`run`]'s error.
pub fn unreported_panic() -> Option<String> {
    guard::take_unreported()
}

fn dispatch(command: Command, progress: Progress) -> Result<ExitCode> {
    match command {
        Command::Demo { out } => demo::demo(&out, progress),
        Command::Check {
            problem,
            start,
            seed,
        } => analysis::check(&problem, start, seed, progress),
        Command::Map { problem, lbfgs } => analysis::map(&problem, &lbfgs, progress),
        Command::Hessian {
            problem,
            lbfgs,
            hessian,
        } => analysis::hessian(&problem, &lbfgs, &hessian, progress),
        Command::Sample {
            problem,
            lbfgs,
            hessian,
            chains,
        } => sample::sample(&problem, &lbfgs, &hessian, &chains, progress),
        Command::Resume { dir, adapter } => sample::resume(&dir, adapter, progress),
        Command::Report { dir, rows } => report::report(&dir, rows),
        Command::Synth { problem, set, out } => synth::synth(&problem, &set, &out),
    }
}

/// Runs `f` with one thread per adapter worker (at least `min_threads`) where the problem is an adapter
/// with several workers: its evaluations wait on I/O, so K chains or K Hessian-vector products then run
/// on K workers at once. Results do not depend on the number of threads.
fn in_worker_pool<T: Send>(
    source: &ProblemSource,
    min_threads: usize,
    f: impl FnOnce() -> Result<T> + Send,
) -> Result<T> {
    match source {
        ProblemSource::Adapter(a) if a.workers > 1 => {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(a.workers.max(min_threads))
                .build()
                .map_err(|e| {
                    Error::System(format!(
                        "cannot start threads for {} adapter workers: {e}",
                        a.workers
                    ))
                })?;
            pool.install(f)
        }
        _ => f(),
    }
}

/// Takes the lock on an output folder before any model starts (released when the returned guard is
/// dropped), and refuses a folder that holds a sampling run when `command` would overwrite it.
fn lock_folder(dir: &std::path::Path, command: &str) -> Result<crate::output::lock::RunLock> {
    let lock = crate::output::lock::RunLock::acquire(dir, &command_line())?;
    if let Some(note) = lock.takeover_note() {
        eprintln!("{note}");
    }
    let overwrites = matches!(command, "check" | "map" | "hessian" | "sample");
    if overwrites && crate::config::RunConfig::exists_in(dir) {
        return Err(Error::Config(format!(
            "{} holds a sampling run: `varpost {command}` would overwrite its files. Continue that run \
             with `varpost resume {}`, report on it with `varpost report {}`, or choose another --out",
            dir.display(),
            dir.display(),
            dir.display()
        )));
    }
    Ok(lock)
}

/// The command line as run, for the NetCDF history.
fn command_line() -> String {
    std::env::args().collect::<Vec<_>>().join(" ")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse_err(args: &[&str]) -> String {
        let mut all = vec!["varpost"];
        all.extend_from_slice(args);
        parse_from(all).unwrap_err().to_string()
    }

    #[test]
    fn adapter_options_without_an_adapter_are_refused() {
        for (opt, value) in [
            ("--workers", "2"),
            ("--encoding", "text"),
            ("--eval-timeout", "5"),
            ("--handshake-timeout", "5"),
            ("--launcher", "mpirun"),
            ("--restarts", "1"),
        ] {
            let e = parse_err(&["map", "--problem", "lorenz96", opt, value]);
            assert!(
                e.contains(&format!("{opt} applies only to --adapter")),
                "{e}"
            );
        }
        // Their defaults are not "given", and with --adapter they are accepted.
        assert!(parse_from(["varpost", "map", "--problem", "lorenz96"]).is_ok());
        assert!(parse_from(["varpost", "sample", "--adapter", "x", "--workers", "2"]).is_ok());
    }

    #[test]
    fn values_are_checked_while_parsing() {
        let e = parse_err(&["check", "--adapter", "x", "--eval-timeout", "1e30"]);
        assert!(e.contains("--eval-timeout") && e.contains("1e9"), "{e}");
        let e = parse_err(&["sample", "--problem", "p", "--hmc-time", "-1"]);
        assert!(e.contains("--hmc-time"), "{e}");
        let e = parse_err(&["sample", "--problem", "p", "--chains", "0"]);
        assert!(e.contains("--chains"), "{e}");
        // Finite and in range, however large: accepted.
        for args in [
            ["hessian", "--problem", "p", "--threshold", "1e30"],
            ["sample", "--problem", "p", "--t-dof", "1e19"],
        ] {
            assert!(
                parse_from(["varpost"].into_iter().chain(args)).is_ok(),
                "{args:?}"
            );
        }
    }

    #[test]
    fn out_is_optional_and_log_format_global() {
        let cli = parse_from([
            "varpost",
            "check",
            "--problem",
            "p",
            "--log-format",
            "plain",
        ])
        .unwrap();
        assert_eq!(
            cli.log_format,
            Some(crate::output::progress::LogFormat::Plain)
        );
        match cli.command {
            Command::Check { problem, .. } => assert!(problem.out.is_none()),
            other => panic!("parsed as {other:?}"),
        }
    }
}
