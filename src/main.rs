//! The `shunt` command: the library's command line ([`shunt::cli::run`])
//! with this process's arguments and exit code. All the work happens in the
//! library.

fn main() -> std::process::ExitCode {
    std::process::ExitCode::from(shunt::cli::run(std::env::args_os()))
}
