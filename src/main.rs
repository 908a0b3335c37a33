//! The `modegram` binary: parse the command line, run it, map the outcome to an exit code
//! (0 success, 1 a failed check, 2 bad input or usage).
fn main() {
    std::process::exit(modegram::cli::main());
}
