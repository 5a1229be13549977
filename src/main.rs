//! The `shunt` command: argument parsing, output files and exit codes. All
//! the work happens in the library.

mod cli;

fn main() -> std::process::ExitCode {
    cli::main()
}
