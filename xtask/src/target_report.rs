//! The per-target summary shared by `cargo xtask device` and `cargo xtask
//! c-check`: one `target <name>: M of N states bit-identical` line per
//! target and the resource table (flash, static RAM, stack high-water mark,
//! emulated instructions per step for each of the blobs every core runs).

use crate::elf_size::ElfSize;

/// What one target (a firmware on one core, or the host) gave.
pub struct TargetResult {
    pub name: String,
    /// States equal to the host rollout, and states expected.
    pub same: usize,
    pub total: usize,
    /// Flash and static RAM of the firmware (None: not a firmware).
    pub size: Option<ElfSize>,
    /// Highest stack high-water mark over its runs, in bytes.
    pub stack_used: Option<u32>,
    /// Emulated instructions per step for each of the core blobs
    /// (`c_cores::CASES`, in order).
    pub instructions_per_step: Vec<Option<f64>>,
}

/// Print one line per target; returns (states equal, states expected)
/// summed over the targets.
pub fn print_lines(targets: &[TargetResult]) -> (usize, usize) {
    for t in targets {
        println!(
            "target {}: {} of {} states bit-identical",
            t.name, t.same, t.total
        );
    }
    (
        targets.iter().map(|t| t.same).sum(),
        targets.iter().map(|t| t.total).sum(),
    )
}

/// Print the resource table of the firmware targets; `blobs` names the
/// instruction columns.
pub fn print_resources(targets: &[TargetResult], blobs: &[String]) {
    println!();
    println!("resource report per target (the same blobs and initial states on every core)");
    let mut head = format!(
        "  {:<24} {:>8} {:>12} {:>8}",
        "target", "flash B", "static RAM B", "stack B"
    );
    for b in blobs {
        head.push_str(&format!(" {:>22}", format!("{b} instr/step")));
    }
    println!("{head}");
    for t in targets {
        let Some(size) = t.size else { continue };
        let mut row = format!(
            "  {:<24} {:>8} {:>12} {:>8}",
            t.name,
            size.flash(),
            size.static_ram(),
            t.stack_used.map_or("?".into(), |s| s.to_string())
        );
        for v in &t.instructions_per_step {
            row.push_str(&format!(
                " {:>22}",
                v.map_or("?".into(), |v| format!("{v:.0}"))
            ));
        }
        println!("{row}");
    }
    println!(
        "  flash = code, constants and the .data image (the blob apart, in its own region); static RAM =\n  \
         .data + .bss; stack = high-water mark of the painted stack over the runs. instr/step = QEMU-\n  \
         emulated instructions per step under -icount (a timer calibrated against a loop of known\n  \
         length), NOT CPU cycles: QEMU models no pipeline timing."
    );
}
