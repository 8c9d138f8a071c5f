fn main() -> std::process::ExitCode {
    vigil_service::cli::run()
}
