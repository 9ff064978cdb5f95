/* Instruction clock on the Arm cores: SysTick (a 24-bit down-counter) on
 * the processor clock. Under QEMU's -icount every instruction advances
 * virtual time by the same amount, so ticks are proportional to emulated
 * instructions; the firmware times vv_clock_loop to find the ratio. These
 * are emulated instructions, not CPU cycles. */
#include "probe.h"

#define SYST_CSR (*(volatile uint32_t *)0xE000E010u)
#define SYST_RVR (*(volatile uint32_t *)0xE000E014u)
#define SYST_CVR (*(volatile uint32_t *)0xE000E018u)
#define SYST_MASK 0x00FFFFFFu

void vv_clock_start(void) {
    SYST_CSR = 0;
    SYST_RVR = SYST_MASK;
    SYST_CVR = 0;
    SYST_CSR = 0x5; /* ENABLE, CLKSOURCE = processor clock, no interrupt */
}

uint32_t vv_clock_read(void) { return SYST_CVR; }

uint32_t vv_clock_span(uint32_t earlier, uint32_t later) { return (earlier - later) & SYST_MASK; }

void vv_clock_loop(uint32_t iterations) {
    __asm__ volatile("1: subs %0, %0, #1\n bne 1b" : "+r"(iterations) : : "cc");
}
