/* The C firmware example: the model blob sits in its own flash region
 * (.vv_model, embedded here from VV_BLOB_PATH at build time), is checked
 * and stepped through the C interface, and every state is printed as exact
 * f32 bit patterns ("k q1 .. qn p1 .. pn") over semihosting, after the
 * library's CRC-32 of the catalogue string "123456789". Build settings:
 * VV_BLOB_PATH, VV_STEPS and VV_Q_INIT (initial coordinates; momenta 0). */
#include <stddef.h>
#include <stdint.h>
#include "visviva.h"

void vv_write(const char *text);

__asm__(".section .vv_model,\"a\"\n"
        ".incbin \"" VV_BLOB_PATH "\"\n"
        ".previous\n");
extern const uint8_t __vv_model_start[], __vv_model_end[];

static VvModel model; /* zeroed by startup: no heap anywhere */

static char *put_hex(char *out, uint32_t v) {
    *out++ = '0';
    *out++ = 'x';
    for (int shift = 28; shift >= 0; shift -= 4) *out++ = "0123456789abcdef"[(v >> shift) & 0xF];
    return out;
}

static char *put_uint(char *out, uint32_t v) {
    char digits[10];
    int n = 0;
    do { digits[n++] = (char)('0' + v % 10); v /= 10; } while (v);
    while (n) *out++ = digits[--n];
    return out;
}

static uint32_t bits_of(float f) {
    union { float f; uint32_t u; } x = {.f = f};
    return x.u;
}

static void print_state(uint32_t k, const float *q, const float *p, uint32_t n) {
    char line[16 + 2 * VV_MAX_DOF * 11 + 2];
    char *out = put_uint(line, k);
    for (uint32_t i = 0; i < 2 * n; i++) {
        *out++ = ' ';
        out = put_hex(out, bits_of(i < n ? q[i] : p[i - n]));
    }
    *out++ = '\n';
    *out = 0;
    vv_write(line);
}

int main(void) {
    static const uint8_t check[] = "123456789";
    char line[32] = "# crc32 ";
    *put_hex(line + 8, vv_crc32(check, 9)) = 0;
    vv_write(line);
    vv_write("\n");

    VvStatus s = vv_model_init(&model, __vv_model_start, (size_t)(__vv_model_end - __vv_model_start));
    if (s != VV_STATUS_OK) {
        vv_write(vv_status_message(s));
        vv_write("\n");
        return 1;
    }
    uint32_t n = vv_dof(&model);
    float q[VV_MAX_DOF] = {VV_Q_INIT}, p[VV_MAX_DOF] = {0};
    print_state(0, q, p, n);
    for (uint32_t k = 1; k <= VV_STEPS; k++) {
        s = vv_step(&model, q, p, VV_MAX_DOF);
        if (s != VV_STATUS_OK) {
            vv_write(vv_status_message(s));
            vv_write("\n");
            return 1;
        }
        print_state(k, q, p, n);
    }
    return 0;
}
