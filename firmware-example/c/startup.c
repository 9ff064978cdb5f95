/* Startup for the C example: vector table, .data/.bss set-up, the stack
 * region painted for the high-water mark (probe.h), the FPU switched on on
 * cores that have one (CPACR CP10/CP11 full access), main, and semihosting
 * for output and exit (ARM semihosting: SYS_WRITE0 = 0x04,
 * SYS_EXIT_EXTENDED = 0x20, through BKPT 0xAB). No C library. */
#include <stdint.h>
#include "probe.h"

extern uint32_t __data_start, __data_end, __data_load, __bss_start, __bss_end, __stack_top;
extern uint32_t __stack_limit[];
int main(void);

static uint32_t semihost(uint32_t op, const void *arg) {
    register uint32_t r0 __asm__("r0") = op;
    register const void *r1 __asm__("r1") = arg;
    __asm__ volatile("bkpt 0xab" : "+r"(r0) : "r"(r1) : "memory");
    return r0;
}

void vv_write(const char *text) { semihost(0x04, text); }

void vv_exit(int code) {
    /* ADP_Stopped_ApplicationExit (0x20026) with the exit code. */
    static uint32_t block[2];
    block[0] = 0x20026;
    block[1] = (uint32_t)code;
    semihost(0x20, block); /* SYS_EXIT_EXTENDED: reason and exit code */
    for (;;) {}
}

void reset_handler(void) {
    /* Paint below the stack pointer only: this frame is above it, and no
     * call happens before the loop ends (volatile: never a memset call). */
    uint32_t *sp;
    __asm__ volatile("mov %0, sp" : "=r"(sp));
    for (volatile uint32_t *w = __stack_limit; w < sp; w++) *w = VV_STACK_PAINT;
    uint32_t *src = &__data_load;
    for (uint32_t *dst = &__data_start; dst < &__data_end;) *dst++ = *src++;
    for (uint32_t *dst = &__bss_start; dst < &__bss_end;) *dst++ = 0;
#ifdef __ARM_FP
    *(volatile uint32_t *)0xE000ED88 |= 0xFu << 20; /* CPACR: CP10, CP11 full access */
    __asm__ volatile("dsb\n isb");
#endif
    vv_exit(main());
}

static void fault_handler(void) { vv_write("hard fault\n"); vv_exit(3); }

__attribute__((section(".vectors"), used))
static const void *const vectors[16] = {
    &__stack_top, (const void *)reset_handler, (const void *)fault_handler,
    (const void *)fault_handler, (const void *)fault_handler,
    (const void *)fault_handler, (const void *)fault_handler,
};
