//! The `leeward` command: parse arguments, run a command, map the outcome to an exit code.

fn main() -> std::process::ExitCode {
    leeward::cli::main()
}
