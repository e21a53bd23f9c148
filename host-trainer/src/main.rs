fn main() -> std::process::ExitCode {
    ellipsoid_trainer::cli::main()
}
