//! The `sluice` command as a library: argument definitions live in `cli.rs`, and each command in
//! `commands.rs` hands its work to a stage crate and only prints what came back (data on stdout,
//! progress and logs on stderr). The binary in the workspace root calls [`main`].

pub mod cli;
mod commands;
mod report;

use clap::Parser;

pub fn main() -> std::process::ExitCode {
    let args = cli::Cli::parse();
    match commands::run(args) {
        Ok(code) => code,
        Err(e) => {
            eprintln!("sluice: error: {e:#}");
            std::process::ExitCode::from(2)
        }
    }
}
