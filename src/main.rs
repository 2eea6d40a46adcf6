//! The `tamis` command: parses arguments and hands over to the library.
fn main() -> std::process::ExitCode {
    tamis::cli::main()
}
