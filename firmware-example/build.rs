//! Build script: hands `memory.x` to the linker and makes the build depend on
//! the model blob and run plan named by `VISVIVA_BLOB` and `VISVIVA_RUN_PLAN`.
use std::{env, fs, path::PathBuf};

fn main() {
    let out = PathBuf::from(env::var_os("OUT_DIR").expect("cargo sets OUT_DIR"));
    fs::write(out.join("memory.x"), include_bytes!("memory.x")).expect("write memory.x");
    println!("cargo:rustc-link-search={}", out.display());
    println!("cargo:rerun-if-changed=memory.x");
    for var in ["VISVIVA_BLOB", "VISVIVA_RUN_PLAN"] {
        println!("cargo:rerun-if-env-changed={var}");
        match env::var_os(var) {
            Some(path) => println!("cargo:rerun-if-changed={}", PathBuf::from(path).display()),
            None => panic!(
                "{var} is not set: point it at a file (VISVIVA_BLOB: a model blob, VISVIVA_RUN_PLAN: a \
                 run plan); `cargo xtask device` sets both"
            ),
        }
    }
    println!("cargo:rerun-if-env-changed=VISVIVA_DRILL");
}
