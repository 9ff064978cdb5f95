/* Stack high-water mark: the startup code painted the stack region
 * (__stack_limit up to the stack pointer at reset) with VV_STACK_PAINT; the
 * lowest word that no longer holds it marks the deepest the stack reached. */
#include "probe.h"

extern uint32_t __stack_limit[], __stack_top[];

uint32_t vv_stack_used(void) {
    const volatile uint32_t *word = __stack_limit;
    while (word < __stack_top && *word == VV_STACK_PAINT) word++;
    return (uint32_t)((uintptr_t)__stack_top - (uintptr_t)word);
}

uint32_t vv_stack_size(void) { return (uint32_t)((uintptr_t)__stack_top - (uintptr_t)__stack_limit); }
