fn main() {
    std::process::exit(riffle::cli::main_with_args(std::env::args_os()));
}
