//! The fit's worker pool keeps fits reproducible: the same seed and thread
//! count give the same blob byte for byte, and the blobs equal reference
//! blobs written earlier for 1, 2 and 3 threads. The pool was first checked
//! against blobs of the build before it (workers spawned per optimizer
//! step, same row partition and reduction order). Three later changes moved
//! every weight in its last bits, and the blobs in `fixtures/threads/` were
//! rewritten once after each: the activation's change to the runtime's
//! tanh, evaluated branch-free over whole rows (`learn/activation.rs`),
//! the networks' products' move from ndarray's `general_mat_mul`
//! (matrixmultiply, whose kernel and so whose bits depend on the CPU) to
//! the trainer's own kernel (`learn/product.rs`), and the rational tanh
//! (`runtime/src/math.rs`). The blobs now in the directory were written by
//! the build with both the kernel and the rational tanh; each product element is
//! one chain of fused multiply-adds in a fixed order on every CPU (AVX-512,
//! AVX2+FMA or the portable variant, see that module), so these bits do not
//! depend on the CPU's vector features. They were written on an x86_64 CPU
//! with AVX-512. They come from the log beside them (the textbook
//! mass-spring solution q = r cos(t + phi), p = -r sin(t + phi),
//! dq/dt = p, dp/dt = -q, 10 trajectories x 30 samples) with the command
//! line of `fit_blob`, compared without the training envelope.

use clap::Parser;
use std::path::{Path, PathBuf};
use visviva_trainer::cli::fit;
use visviva_trainer::deploy::blob::BlobModel;

#[derive(Parser)]
struct Cli {
    #[command(flatten)]
    args: fit::Args,
}

fn fixtures() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("fixtures")
        .join("threads")
}

/// `visviva fit` of the fixture log on `threads` threads into `out`: batch
/// 64 (240 training rows, so each epoch ends with a short batch), 60 steps,
/// validation split 0.2 (the default), seed 5.
fn fit_blob(threads: usize, out: &Path) -> Vec<u8> {
    let data = fixtures().join("threads_mass_spring.csv");
    let threads = threads.to_string();
    let args = [
        "visviva-fit",
        "--data",
        data.to_str().unwrap(),
        "--arch",
        "general",
        "--hidden",
        "8,8",
        "--batch",
        "64",
        "--optimizer-steps",
        "60",
        "--threads",
        &threads,
        "--seed",
        "5",
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ];
    fit::run(Cli::try_parse_from(args).unwrap().args).unwrap();
    std::fs::read(out).unwrap()
}

/// `blob` without its training envelope (format version 4), which the
/// earlier build did not write: the rest, weights included, must be the
/// same bytes.
fn without_envelope(blob: &[u8]) -> Vec<u8> {
    let mut model = BlobModel::from_bytes(blob).unwrap();
    assert!(
        model.envelope.is_some(),
        "a fit writes its training envelope"
    );
    model.envelope = None;
    model.to_bytes().unwrap()
}

#[test]
fn blobs_equal_the_reference_blobs_for_one_two_and_three_threads() {
    let dir = tempfile::tempdir().unwrap();
    for threads in [1, 2, 3] {
        let got = without_envelope(&fit_blob(
            threads,
            &dir.path().join(format!("t{threads}.vvb")),
        ));
        // The reference blob, decoded and written again (the format
        // version today's writer picks), must be the same bytes.
        let before =
            std::fs::read(fixtures().join(format!("threads_before_t{threads}.vvb"))).unwrap();
        let want = BlobModel::from_bytes(&before).unwrap().to_bytes().unwrap();
        assert!(
            got == want,
            "{threads} thread(s): the blob differs from the reference blob"
        );
    }
}

#[test]
fn same_seed_and_thread_count_give_identical_blobs() {
    let dir = tempfile::tempdir().unwrap();
    for threads in [2, 4] {
        let a = fit_blob(threads, &dir.path().join(format!("a{threads}.vvb")));
        let b = fit_blob(threads, &dir.path().join(format!("b{threads}.vvb")));
        assert!(a == b, "{threads} threads: two runs differ");
    }
    // The partition changes the summation order, so thread counts differ
    // in the last bits (the reason reproducibility is per thread count).
    let one = fit_blob(1, &dir.path().join("one.vvb"));
    let two = fit_blob(2, &dir.path().join("two.vvb"));
    assert!(one != two, "1 and 2 threads gave the same blob");
}
