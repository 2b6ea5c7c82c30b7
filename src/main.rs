//! The `braid` binary: a thin shell over the library.

fn main() {
    std::process::exit(braid::cli::main_exit_code());
}
