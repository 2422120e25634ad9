fn main() -> std::process::ExitCode {
    understudy::cli::main()
}
