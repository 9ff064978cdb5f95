//! `visviva inspect` into a pipe whose reader has gone (as `| head` leaves
//! it once it has its lines): the command ends quietly with success, as
//! command-line tools conventionally do, instead of panicking on the
//! broken pipe.

use std::process::{Command, Stdio};

#[test]
fn inspect_into_a_closed_pipe_ends_quietly() {
    let blob = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../models-demo/crane-sway/out/crane-int8-verlet.vvb"
    );
    for json in [false, true] {
        let mut cmd = Command::new(env!("CARGO_BIN_EXE_visviva"));
        cmd.arg("inspect").arg(blob);
        if json {
            cmd.arg("--json");
        }
        let mut child = cmd
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        // Close the read end before the command writes.
        drop(child.stdout.take());
        let out = child.wait_with_output().unwrap();
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert!(out.status.success(), "json {json}: {stderr}");
        assert!(!stderr.contains("panicked"), "json {json}: {stderr}");
    }
}
