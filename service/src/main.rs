fn main() -> std::process::ExitCode {
    henrybook::cli::main(std::env::args().skip(1).collect())
}
