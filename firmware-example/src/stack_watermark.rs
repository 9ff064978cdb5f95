//! Stack high-water mark. cortex-m-rt's `paint-stack` feature fills the RAM
//! between `_stack_end` and `_stack_start` with 0xCCCC_CCCC before `main`;
//! the lowest word no longer holding that value marks the deepest the stack
//! has reached.

/// Stack usage at the time of measurement.
pub struct StackUse {
    /// Bytes from the top of the stack down to the deepest overwritten word.
    pub used_bytes: u32,
    /// Bytes between the end of static RAM and the top of the stack.
    pub region_bytes: u32,
}

extern "C" {
    static _stack_start: u32;
    static _stack_end: u32;
}

/// Scan the painted region from its low end upward.
pub fn measure() -> StackUse {
    let top = core::ptr::addr_of!(_stack_start) as usize;
    let bottom = core::ptr::addr_of!(_stack_end) as usize;
    let mut addr = bottom;
    while addr < top {
        // SAFETY: the address lies in RAM between the linker-provided stack
        // bounds and is 4-byte aligned (cortex-m-rt asserts both bounds).
        let word = unsafe { core::ptr::read_volatile(addr as *const u32) };
        if word != cortex_m_rt::STACK_PAINT_VALUE {
            break;
        }
        addr += 4;
    }
    StackUse {
        used_bytes: (top - addr) as u32,
        region_bytes: (top - bottom) as u32,
    }
}
