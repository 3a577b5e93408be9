//! The `sluice` binary: everything it does lives in the `sluice-cli` library and the stage crates.

fn main() -> std::process::ExitCode {
    sluice_cli::main()
}
