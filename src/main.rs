use std::process::ExitCode;

fn main() -> ExitCode {
    plumbline::cli::run()
}
