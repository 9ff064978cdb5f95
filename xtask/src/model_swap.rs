//! Changing the weights without rebuilding: write another blob over the
//! `.vv_model` section of a built ELF, the way a flash write at the
//! region's address would on a board (bytes after the blob are set to the
//! erased-flash value 0xFF; the firmware takes the blob's length from its
//! header).

use std::path::Path;

use anyhow::{bail, Context, Result};
use object::{Object, ObjectSection};

/// Copy `elf_in` to `elf_out` with `blob` written into `.vv_model`.
pub fn patch_model_section(elf_in: &Path, blob: &[u8], elf_out: &Path) -> Result<()> {
    let mut bytes =
        std::fs::read(elf_in).with_context(|| format!("reading {}", elf_in.display()))?;
    let (offset, size) = {
        let file = object::File::parse(&*bytes)
            .with_context(|| format!("parsing {}", elf_in.display()))?;
        let section = file
            .section_by_name(".vv_model")
            .with_context(|| format!("{} has no .vv_model section", elf_in.display()))?;
        section
            .file_range()
            .context(".vv_model has no file contents")?
    };
    let (offset, size) = (offset as usize, size as usize);
    if blob.len() > size {
        bail!(
            "blob of {} bytes does not fit the {size}-byte .vv_model section of {} \
             (on a board the whole VV_MODEL region is available)",
            blob.len(),
            elf_in.display()
        );
    }
    let section = &mut bytes[offset..offset + size];
    section.fill(0xFF);
    section[..blob.len()].copy_from_slice(blob);
    std::fs::write(elf_out, &bytes).with_context(|| format!("writing {}", elf_out.display()))
}
