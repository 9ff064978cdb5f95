//! The committed C header `include/visviva.h` is what cbindgen generates
//! from the current source (run with `VISVIVA_WRITE_HEADER=1` to rewrite it).

use std::path::Path;

#[test]
fn committed_header_matches_a_fresh_generation() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"));
    let config = cbindgen::Config::from_file(dir.join("cbindgen.toml")).unwrap();
    let mut fresh = Vec::new();
    cbindgen::Builder::new()
        .with_crate(dir)
        .with_config(config)
        .generate()
        .expect("cbindgen generates the header")
        .write(&mut fresh);
    let path = dir.join("include/visviva.h");
    if std::env::var_os("VISVIVA_WRITE_HEADER").is_some() {
        std::fs::write(&path, &fresh).unwrap();
    }
    let committed = std::fs::read(&path).unwrap_or_default();
    assert!(
        committed == fresh,
        "include/visviva.h differs from cbindgen's output; regenerate with \
         VISVIVA_WRITE_HEADER=1 cargo test -p visviva-c --test header"
    );
}
