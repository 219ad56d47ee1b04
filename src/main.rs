fn main() -> std::process::ExitCode {
    tarn::cli::main()
}
