//! Deterministic time measurement with SysTick. Under QEMU's `-icount
//! shift=N` every guest instruction advances virtual time by 2^N ns, and the
//! mps2-an386 SysTick counts the 25 MHz processor clock (40 ns per tick), so
//! ticks = instructions * 2^N / 40. These are EMULATOR INSTRUCTIONS, not CPU
//! cycles: QEMU models neither pipeline timing nor the DWT cycle counter.
//! [`InstrClock::calibrate`] times a loop of known length so the host can
//! verify the ratio.

use cortex_m::peripheral::{syst::SystClkSource, SYST};

/// SysTick is a 24-bit down-counter.
const COUNTER_MASK: u32 = 0x00FF_FFFF;
/// Iterations of the calibration loop (two instructions each).
const CALIBRATION_ITERATIONS: u32 = 100_000;

/// A free-running SysTick counter on the processor clock.
pub struct InstrClock {
    overhead: u32,
    _syst: SYST,
}

/// Result of timing the calibration loop.
pub struct Calibration {
    /// Instructions the loop executes (`subs` + `bne` per iteration).
    pub loop_instructions: u32,
    /// SysTick ticks measured for it (reading overhead subtracted).
    pub loop_ticks: u32,
    /// Ticks between two back-to-back counter reads.
    pub overhead_ticks: u32,
}

impl InstrClock {
    /// Configure SysTick: processor clock, full 24-bit reload, no interrupt.
    pub fn start(mut syst: SYST) -> Self {
        syst.disable_interrupt();
        syst.set_clock_source(SystClkSource::Core);
        syst.set_reload(COUNTER_MASK);
        syst.clear_current();
        syst.enable_counter();
        let mut clock = Self {
            overhead: 0,
            _syst: syst,
        };
        let a = clock.now();
        let b = clock.now();
        clock.overhead = raw_elapsed(a, b);
        clock
    }

    /// The current counter value.
    #[inline(always)]
    pub fn now(&self) -> u32 {
        SYST::get_current()
    }

    /// Ticks from `earlier` to `later` (both from [`Self::now`]), minus the
    /// cost of reading the counter; valid for intervals under 2^24 ticks.
    #[inline(always)]
    pub fn elapsed(&self, earlier: u32, later: u32) -> u32 {
        raw_elapsed(earlier, later).saturating_sub(self.overhead)
    }

    /// Time a loop of known instruction count.
    pub fn calibrate(&self) -> Calibration {
        let t0 = self.now();
        // SAFETY: a register-only countdown loop; touches no memory.
        unsafe {
            core::arch::asm!(
                "2:",
                "subs {n}, #1",
                "bne 2b",
                n = inout(reg) CALIBRATION_ITERATIONS => _,
                options(nomem, nostack)
            );
        }
        let t1 = self.now();
        Calibration {
            loop_instructions: 2 * CALIBRATION_ITERATIONS,
            loop_ticks: self.elapsed(t0, t1),
            overhead_ticks: self.overhead,
        }
    }
}

fn raw_elapsed(earlier: u32, later: u32) -> u32 {
    earlier.wrapping_sub(later) & COUNTER_MASK
}
