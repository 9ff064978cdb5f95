//! The C firmware `firmware-example/c` on one core: the cores it is built
//! for (each with its QEMU board), building the C interface's static library
//! for a core's Rust target, compiling and linking the firmware with one
//! blob, running it in QEMU under `-icount`, and reading what it printed
//! over semihosting (CRC line, states as bit patterns, refusal, instruction
//! clock calibration and timing, stack high-water mark).

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};

use anyhow::{bail, Context, Result};

use crate::qemu_run::ICOUNT_SHIFT;
use crate::tools::cargo;

/// A core the C firmware runs on: Rust target of the library, C compiler
/// and flags, startup, instruction clock and memory map, QEMU board.
pub struct Board {
    pub name: &'static str,
    pub rust_target: &'static str,
    /// C compiler and the distribution package that has it.
    pub cc: (&'static str, &'static str),
    cflags: &'static [&'static str],
    /// Startup file, instruction clock file and linker script (the board's
    /// memory map) in `firmware-example/c`.
    startup: &'static str,
    clock: &'static str,
    memory: &'static str,
    /// QEMU system emulator, its package, and its board arguments.
    pub qemu: (&'static str, &'static str),
    qemu_args: &'static [&'static str],
    /// Frequency of the timer the firmware reads (SysTick on the processor
    /// clock, or the CLINT's mtime), as QEMU models the board (from memory:
    /// QEMU's mps2 boards run at 25 MHz, mps2-an505 at 20 MHz, the virt
    /// board's CLINT timebase is 10 MHz). The check verifies it.
    pub timer_hz: f64,
}

const ARM_CC: (&str, &str) = ("arm-none-eabi-gcc", "gcc-arm-none-eabi");
const ARM_QEMU: (&str, &str) = ("qemu-system-arm", "qemu-system-arm");

/// The cores checked, each on a QEMU board with its memory map in
/// `firmware-example/c`. The Cortex-M3 and the RISC-V core have no FPU:
/// their libraries do float arithmetic in software, so IEEE 754-2019's
/// correctly rounded +, -, *, / and sqrt must give the hardware's bits.
pub const BOARDS: &[Board] = &[
    Board {
        name: "cortex-m4f-c",
        rust_target: "thumbv7em-none-eabihf",
        cc: ARM_CC,
        cflags: &[
            "-mthumb",
            "-mcpu=cortex-m4",
            "-mfloat-abi=hard",
            "-mfpu=fpv4-sp-d16",
        ],
        startup: "startup.c",
        clock: "clock-arm.c",
        memory: "mps2-an38x.ld",
        qemu: ARM_QEMU,
        qemu_args: &["-machine", "mps2-an386", "-cpu", "cortex-m4"],
        timer_hz: 25e6,
    },
    Board {
        name: "cortex-m7-c",
        rust_target: "thumbv7em-none-eabihf",
        cc: ARM_CC,
        cflags: &[
            "-mthumb",
            "-mcpu=cortex-m7",
            "-mfloat-abi=hard",
            "-mfpu=fpv5-d16",
        ],
        startup: "startup.c",
        clock: "clock-arm.c",
        memory: "mps2-an38x.ld",
        qemu: ARM_QEMU,
        qemu_args: &["-machine", "mps2-an500", "-cpu", "cortex-m7"],
        timer_hz: 25e6,
    },
    Board {
        name: "cortex-m33-c",
        rust_target: "thumbv8m.main-none-eabihf",
        cc: ARM_CC,
        cflags: &[
            "-mthumb",
            "-mcpu=cortex-m33",
            "-mfloat-abi=hard",
            "-mfpu=fpv5-sp-d16",
        ],
        startup: "startup.c",
        clock: "clock-arm.c",
        memory: "mps2-an505.ld",
        qemu: ARM_QEMU,
        qemu_args: &["-machine", "mps2-an505", "-cpu", "cortex-m33"],
        timer_hz: 20e6,
    },
    Board {
        name: "cortex-m3-softfloat-c",
        rust_target: "thumbv7m-none-eabi",
        cc: ARM_CC,
        cflags: &["-mthumb", "-mcpu=cortex-m3", "-mfloat-abi=soft"],
        startup: "startup.c",
        clock: "clock-arm.c",
        memory: "mps2-an38x.ld",
        qemu: ARM_QEMU,
        qemu_args: &["-machine", "mps2-an385", "-cpu", "cortex-m3"],
        timer_hz: 25e6,
    },
    Board {
        name: "riscv32imac-softfloat-c",
        rust_target: "riscv32imac-unknown-none-elf",
        cc: ("riscv64-unknown-elf-gcc", "gcc-riscv64-unknown-elf"),
        cflags: &["-march=rv32imac", "-mabi=ilp32"],
        startup: "startup-riscv.c",
        clock: "clock-riscv.c",
        memory: "riscv-virt.ld",
        qemu: ("qemu-system-riscv32", "qemu-system-misc"),
        qemu_args: &["-machine", "virt", "-bios", "none"],
        timer_hz: 10e6,
    },
];

/// `CARGO_TARGET_DIR`, or the workspace's `target`.
pub fn target_dir(root: &Path) -> PathBuf {
    std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| root.join("target"))
}

/// Install the Rust target, C compiler and QEMU of every board if missing.
pub fn ensure_tools() -> Result<()> {
    for board in BOARDS {
        crate::tools::ensure_rust_target(board.rust_target)?;
        crate::tools::ensure_package(board.cc.0, board.cc.1)?;
        crate::tools::ensure_package(board.qemu.0, board.qemu.1)?;
    }
    Ok(())
}

/// Build the static library (for `target`, or the host); returns its path.
pub fn build_library(root: &Path, target: Option<&str>) -> Result<PathBuf> {
    let mut cmd = Command::new(cargo());
    cmd.args(["rustc", "--quiet", "-p", "visviva-c", "--profile", "c-lib"])
        .args(["--features", "panic-halt", "--crate-type", "staticlib"]);
    if let Some(t) = target {
        cmd.args(["--target", t]);
    }
    let status = cmd
        .current_dir(root)
        .status()
        .context("starting cargo rustc -p visviva-c")?;
    if !status.success() {
        bail!("building the C static library failed ({status})");
    }
    let dir = target.map_or(target_dir(root), |t| target_dir(root).join(t));
    Ok(dir.join("c-lib").join("libvisviva_c.a"))
}

/// Build the C firmware for one blob and initial coordinates into
/// `work/<board>-<name>.elf`; returns the ELF.
pub fn build(
    root: &Path,
    work: &Path,
    board: &Board,
    lib: &Path,
    (blob, q, steps): (&Path, &[f32], u32),
    name: &str,
) -> Result<PathBuf> {
    let c = root.join("firmware-example/c");
    let elf = work.join(format!("{}-{name}.elf", board.name));
    // `{:?}` prints the shortest decimal that reads back as the same f32.
    let q_init: Vec<String> = q.iter().map(|v| format!("{v:?}f")).collect();
    let status = Command::new(board.cc.0)
        .args(["-std=c11", "-Wall", "-Wextra", "-Werror", "-O2"])
        .args(board.cflags)
        .args(["-ffreestanding", "-nostdlib", "-fno-common"])
        .args([
            "-ffunction-sections",
            "-fdata-sections",
            "-Wl,--gc-sections",
        ])
        .args(["-Wl,--no-warn-execstack", "-I"])
        .arg(root.join("runtime/c-api/include"))
        .arg(format!("-DVV_BLOB_PATH=\"{}\"", blob.display()))
        .arg(format!("-DVV_STEPS={steps}"))
        .arg(format!("-DVV_Q_INIT={}", q_init.join(",")))
        .arg("-L")
        .arg(&c)
        .arg("-T")
        .arg(c.join(board.memory))
        .args([board.startup, board.clock, "stack.c", "main.c"].map(|f| c.join(f)))
        .arg(lib)
        .arg("-o")
        .arg(&elf)
        .status()
        .with_context(|| format!("starting {}", board.cc.0))?;
    if !status.success() {
        bail!(
            "building the C firmware for {} ({name}) failed ({status})",
            board.name
        );
    }
    Ok(elf)
}

/// What one run printed, and how it ended.
pub struct Run {
    /// QEMU's exit code (the firmware's, through semihosting); None when
    /// killed by the timeout.
    pub exit_code: Option<i32>,
    /// The semihosting text (QEMU writes SYS_WRITE0 text to its stderr).
    pub text: String,
}

/// Run a firmware ELF in QEMU with `-icount shift=ICOUNT_SHIFT` (every
/// instruction advances virtual time by 2^shift ns).
pub fn run(board: &Board, elf: &Path) -> Result<Run> {
    let out = Command::new("timeout")
        .args(["300", board.qemu.0])
        .args(board.qemu_args)
        .args(["-nographic", "-serial", "null", "-monitor", "none"])
        .args(["-icount", &format!("shift={ICOUNT_SHIFT}")])
        .args(["-semihosting-config", "enable=on,target=native", "-kernel"])
        .arg(elf)
        .stdin(Stdio::null())
        .output()
        .with_context(|| format!("starting {}", board.qemu.0))?;
    Ok(Run {
        exit_code: out.status.code().filter(|c| *c != 124),
        text: String::from_utf8_lossy(&out.stderr).into_owned(),
    })
}

/// Everything the C firmware printed, read back.
#[derive(Debug, Default)]
pub struct CLog {
    /// The library's CRC-32 of "123456789".
    pub crc: Option<u32>,
    /// States by step: bit patterns of q1..qn, p1..pn.
    pub states: Vec<(u32, Vec<u32>)>,
    /// "refused: <status name>: <message>" or "step failed: ...".
    pub failure: Option<String>,
    /// (loop instructions, ticks, read overhead ticks).
    pub calibration: Option<(u32, u32, u32)>,
    /// (steps timed, clock ticks inside `vv_step`).
    pub timing: Option<(u32, u64)>,
    /// (stack bytes used, stack region bytes).
    pub stack: Option<(u32, u32)>,
    /// Lines of no known kind (QEMU's own messages, a torn line).
    pub other: Vec<String>,
}

fn field(line: &str, key: &str) -> Option<u32> {
    line.split_whitespace()
        .find_map(|t| t.strip_prefix(key)?.strip_prefix('='))
        .and_then(|v| v.parse().ok())
}

fn hex(word: &str) -> Option<u32> {
    u32::from_str_radix(word.strip_prefix("0x")?, 16).ok()
}

/// A state line "k 0x.. 0x..".
fn state(line: &str) -> Option<(u32, Vec<u32>)> {
    let mut words = line.split_whitespace();
    let k = words.next()?.parse().ok()?;
    let bits = words.map(hex).collect::<Option<Vec<u32>>>()?;
    Some((k, bits))
}

/// Read the firmware's output; lines of no known kind are kept in `other`.
pub fn parse(text: &str) -> CLog {
    let mut log = CLog::default();
    for line in text.lines() {
        if let Some(v) = line.strip_prefix("# crc32 ") {
            log.crc = hex(v.trim());
        } else if line.starts_with("# calib ") {
            let f = |k| field(line, k);
            log.calibration = f("loop_instructions")
                .zip(f("ticks"))
                .zip(f("overhead_ticks"))
                .map(|((a, b), c)| (a, b, c));
        } else if line.starts_with("# timing ") {
            let ticks = field(line, "ticks_hi")
                .zip(field(line, "ticks_lo"))
                .map(|(hi, lo)| (u64::from(hi) << 32) | u64::from(lo));
            log.timing = field(line, "steps").zip(ticks);
        } else if line.starts_with("# stack ") {
            log.stack = field(line, "used").zip(field(line, "size"));
        } else if line.starts_with("refused: ") || line.starts_with("step failed: ") {
            log.failure = Some(line.to_string());
        } else if let Some(s) = state(line) {
            log.states.push(s);
        } else if !line.trim().is_empty() {
            log.other.push(line.to_string());
        }
    }
    log
}

impl CLog {
    /// Emulated instructions per `vv_step`: ticks per step over the
    /// calibration loop's ticks per instruction.
    pub fn instructions_per_step(&self) -> Option<f64> {
        let (instr, loop_ticks, _) = self.calibration?;
        let (steps, ticks) = self.timing?;
        (steps > 0 && loop_ticks > 0)
            .then(|| ticks as f64 / f64::from(steps) * f64::from(instr) / f64::from(loop_ticks))
    }
}

/// The ticks the calibration loop should take on `board`: instructions *
/// 2^shift ns * the timer's frequency.
pub fn expected_calibration_ticks(board: &Board, instructions: u32) -> f64 {
    f64::from(instructions) * f64::from(1u32 << ICOUNT_SHIFT) * 1e-9 * board.timer_hz
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn states_measurements_and_refusals_are_read() {
        // IEEE 754 binary32: 1.0 = 0x3f800000, -2.0 = 0xc0000000.
        let text = "# crc32 0xcbf43926\n0 0x3f800000 0xc0000000\n1 0x3f800000 0x00000000\n\
                    # calib loop_instructions=200000 ticks=320000 overhead_ticks=3\n\
                    # timing steps=2 ticks_hi=1 ticks_lo=4\n# stack used=1200 size=32768\n";
        let log = parse(text);
        assert_eq!(log.crc, Some(0xCBF4_3926));
        assert_eq!(log.states[0], (0, vec![0x3F80_0000, 0xC000_0000]));
        assert_eq!(f32::from_bits(log.states[0].1[1]), -2.0);
        assert_eq!(log.timing, Some((2, (1u64 << 32) + 4)));
        assert_eq!(log.stack, Some((1200, 32768)));
        // (2^32 + 4) ticks / 2 steps at 1.6 ticks per instruction.
        let per_step = log.instructions_per_step().unwrap();
        assert!((per_step - (4_294_967_300.0 / 2.0 / 1.6)).abs() < 1e-3);
        let refused = parse("# crc32 0xcbf43926\nrefused: VV_STATUS_BLOB_TOO_WIDE: wide\n");
        assert!(refused.failure.unwrap().contains("TOO_WIDE"));
        assert_eq!(parse("0 0x3f80zzzz\n").other, ["0 0x3f80zzzz"]);
    }

    #[test]
    fn calibration_expectation_matches_the_rust_firmware_systick_ratio() {
        // The Rust firmware's instr_clock: ticks = instructions * 2^6 / 40
        // on mps2-an386 (25 MHz processor clock, 40 ns per tick).
        let m4 = &BOARDS[0];
        let want = 200_000.0 * 64.0 / 40.0;
        assert!((expected_calibration_ticks(m4, 200_000) - want).abs() < 1e-6);
    }
}
