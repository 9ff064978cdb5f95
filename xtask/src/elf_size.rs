//! Flash and static RAM of the firmware, read from the ELF's section headers
//! with the `object` crate.

use std::path::Path;

use anyhow::{Context, Result};
use object::{Object, ObjectSection};

/// Section sizes in bytes.
#[derive(Debug, Clone, Copy, Default)]
pub struct ElfSize {
    /// `.vector_table` + `.text` + `.rodata` (code and constants).
    pub flash_code: u64,
    /// `.data` (its initial image also occupies flash).
    pub data: u64,
    /// `.bss` + `.uninit`.
    pub bss: u64,
    /// `.vv_model` (the blob in its own flash region).
    pub model_region: u64,
}

impl ElfSize {
    /// Flash in total: code, constants and the `.data` image (not the blob).
    pub fn flash(&self) -> u64 {
        self.flash_code + self.data
    }

    /// Static RAM: `.data` + `.bss` + `.uninit`.
    pub fn static_ram(&self) -> u64 {
        self.data + self.bss
    }
}

/// Read the section sizes of `elf`.
pub fn read(elf: &Path) -> Result<ElfSize> {
    let bytes = std::fs::read(elf).with_context(|| format!("reading {}", elf.display()))?;
    let file =
        object::File::parse(&*bytes).with_context(|| format!("parsing {}", elf.display()))?;
    let mut size = ElfSize::default();
    for section in file.sections() {
        let n = section.size();
        match section.name().unwrap_or("") {
            ".vector_table" | ".vectors" | ".text" | ".rodata" => size.flash_code += n,
            ".data" => size.data += n,
            ".bss" | ".uninit" => size.bss += n,
            ".vv_model" => size.model_region += n,
            _ => {}
        }
    }
    Ok(size)
}
