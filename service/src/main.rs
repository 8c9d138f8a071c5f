fn main() -> std::process::ExitCode {
    tidemark_service::cli::run()
}
