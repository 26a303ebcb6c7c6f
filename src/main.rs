fn main() {
    std::process::exit(meterproof::cli::main());
}
