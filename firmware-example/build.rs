//! Build script: hands `memory.x` to the linker and makes the build depend on
//! the model blob named by `VISVIVA_BLOB` (required), the run plan named
//! by `VISVIVA_RUN_PLAN` (needed by the test-harness binary only) and the
//! observer plan named by `VISVIVA_OBSERVER_PLAN` (the harness built with
//! the `observe` feature).
use std::{env, fs, path::PathBuf};

fn main() {
    let out = PathBuf::from(env::var_os("OUT_DIR").expect("cargo sets OUT_DIR"));
    fs::write(out.join("memory.x"), include_bytes!("memory.x")).expect("write memory.x");
    println!("cargo:rustc-link-search={}", out.display());
    println!("cargo:rerun-if-changed=memory.x");
    // Every program here embeds the blob; only the test-harness binary
    // (src/main.rs) also embeds a run plan or an observer plan, and says so
    // when it is missing.
    for (var, required) in [
        ("VISVIVA_BLOB", true),
        ("VISVIVA_RUN_PLAN", false),
        ("VISVIVA_OBSERVER_PLAN", false),
    ] {
        println!("cargo:rerun-if-env-changed={var}");
        match env::var_os(var) {
            Some(path) => println!("cargo:rerun-if-changed={}", PathBuf::from(path).display()),
            None if required => panic!(
                "{var} is not set: point it at a model blob (`cargo xtask device` sets it, and \
                 VISVIVA_RUN_PLAN for the test-harness binary)"
            ),
            None => {}
        }
    }
    println!("cargo:rerun-if-env-changed=VISVIVA_DRILL");
}
