use std::process::ExitCode;

fn main() -> ExitCode {
    candor::cli::main()
}
