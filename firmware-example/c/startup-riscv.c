/* Startup for the C example on a 32-bit RISC-V core (QEMU's virt board):
 * stack, .data/.bss set-up, the stack region painted for the high-water
 * mark (probe.h), main, and semihosting for output and exit
 * (the RISC-V semihosting sequence slli/ebreak/srai with the ARM
 * semihosting operations SYS_WRITE0 = 0x04 and SYS_EXIT_EXTENDED = 0x20).
 * No C library. */
#include <stdint.h>
#include "probe.h"

extern uint32_t __data_start, __data_end, __data_load, __bss_start, __bss_end, __stack_top;
extern uint32_t __stack_limit[];
int main(void);

static uint32_t semihost(uint32_t op, const void *arg) {
    register uint32_t a0 __asm__("a0") = op;
    register const void *a1 __asm__("a1") = arg;
    __asm__ volatile(".option push\n .option norvc\n"
                     " slli zero, zero, 0x1f\n ebreak\n srai zero, zero, 7\n"
                     ".option pop"
                     : "+r"(a0)
                     : "r"(a1)
                     : "memory");
    return a0;
}

void vv_write(const char *text) { semihost(0x04, text); }

void vv_exit(int code) {
    static uint32_t block[2];
    block[0] = 0x20026; /* ADP_Stopped_ApplicationExit */
    block[1] = (uint32_t)code;
    semihost(0x20, block);
    for (;;) {}
}

void start_c(void) {
    /* Paint below the stack pointer only: this frame is above it, and no
     * call happens before the loop ends (volatile: never a memset call). */
    uint32_t *sp;
    __asm__ volatile("mv %0, sp" : "=r"(sp));
    for (volatile uint32_t *w = __stack_limit; w < sp; w++) *w = VV_STACK_PAINT;
    uint32_t *src = &__data_load;
    for (uint32_t *dst = &__data_start; dst < &__data_end;) *dst++ = *src++;
    for (uint32_t *dst = &__bss_start; dst < &__bss_end;) *dst++ = 0;
    vv_exit(main());
}

__asm__(".section .vectors, \"ax\"\n"
        ".global reset_handler\n"
        "reset_handler:\n"
        " la sp, __stack_top\n"
        " j start_c\n"
        ".previous\n");
