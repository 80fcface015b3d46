//! The `lotdrift` binary: everything lives in the library; this only hands over.

fn main() -> std::process::ExitCode {
    lotdrift::cli::main()
}
