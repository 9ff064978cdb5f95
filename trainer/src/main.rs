//! `visviva`: the host command line; everything it does lives in the library
//! (`cli/` parses and prints, the stage folders do the work).

fn main() -> std::process::ExitCode {
    visviva_trainer::cli::main()
}
