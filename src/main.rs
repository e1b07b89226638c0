//! The varpost binary: parse, run, and turn the result into an exit code and a readable error.

use clap::Parser;

fn main() {
    let cli = varpost::cli::Cli::parse();
    match varpost::cli::run(cli) {
        Ok(code) => std::process::exit(code),
        Err(e) => {
            eprintln!("error: {e}");
            let mut source = std::error::Error::source(&e);
            while let Some(s) = source {
                eprintln!("  caused by: {s}");
                source = s.source();
            }
            std::process::exit(match e {
                varpost::Error::Config(_) => 2,
                varpost::Error::GradientCheck(_) => 3,
                varpost::Error::Interrupted(_) => 130,
                _ => 1,
            });
        }
    }
}
