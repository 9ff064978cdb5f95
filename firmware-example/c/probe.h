/* What the C firmware measures about itself, beside its states: an
 * instruction clock (a timer that, under QEMU's -icount, advances a fixed
 * number of ticks per emulated instruction; one implementation per core
 * family) and the stack high-water mark (the stack painted by the startup
 * code, scanned after the run). */
#ifndef VV_PROBE_H
#define VV_PROBE_H
#include <stdint.h>

/* The word the startup code paints the stack region with. */
#define VV_STACK_PAINT 0xCCCCCCCCu

/* Start the free-running timer. */
void vv_clock_start(void);
/* Its current count. */
uint32_t vv_clock_read(void);
/* Ticks from `earlier` to `later` (two vv_clock_read values). */
uint32_t vv_clock_span(uint32_t earlier, uint32_t later);
/* A register-only countdown loop of exactly 2 * iterations instructions. */
void vv_clock_loop(uint32_t iterations);

/* Bytes of the stack region ever written (from its top down to the lowest
 * word that lost the paint) and the region's size. */
uint32_t vv_stack_used(void);
uint32_t vv_stack_size(void);

#endif
