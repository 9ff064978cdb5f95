/* Instruction clock on the RISC-V core: the low word of the CLINT's mtime
 * (QEMU virt board, 0x0200BFF8), counting up. Under QEMU's -icount every
 * instruction advances virtual time by the same amount, so ticks are
 * proportional to emulated instructions; the firmware times vv_clock_loop
 * to find the ratio. These are emulated instructions, not CPU cycles. */
#include "probe.h"

#define MTIME_LO (*(volatile uint32_t *)0x0200BFF8u)

void vv_clock_start(void) {}

uint32_t vv_clock_read(void) { return MTIME_LO; }

uint32_t vv_clock_span(uint32_t earlier, uint32_t later) { return later - earlier; }

void vv_clock_loop(uint32_t iterations) {
    __asm__ volatile("1: addi %0, %0, -1\n bnez %0, 1b" : "+r"(iterations));
}
