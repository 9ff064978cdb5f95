/* The C firmware example: the model blob sits in its own flash region
 * (.vv_model, embedded here from VV_BLOB_PATH at build time), is checked
 * and stepped through the C interface, and every state is printed as exact
 * f32 bit patterns ("k q1 .. qn p1 .. pn") over semihosting, after the
 * library's CRC-32 of the catalogue string "123456789". A refused blob
 * prints "refused: <status name>: <message>" and exits 1. After the run:
 * "# calib" (the instruction clock timed over a loop of known length),
 * "# timing" (clock ticks inside vv_step) and "# stack" (high-water mark)
 * lines. Build settings: VV_BLOB_PATH, VV_STEPS and VV_Q_INIT (initial
 * coordinates; momenta 0). */
#include <stddef.h>
#include <stdint.h>
#include "probe.h"
#include "visviva.h"

void vv_write(const char *text);

__asm__(".section .vv_model,\"a\"\n"
        ".incbin \"" VV_BLOB_PATH "\"\n"
        ".previous\n");
extern const uint8_t __vv_model_start[], __vv_model_end[];

/* Iterations of the calibration loop (two instructions each). */
#define VV_CALIBRATION_ITERATIONS 100000u

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

static char *put_text(char *out, const char *text) {
    while (*text) *out++ = *text++;
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

/* "<label> a=<x> b=<y> c=<z>\n" with up to three unsigned fields. */
static void print_fields(const char *label, const char *const keys[3], const uint32_t values[3]) {
    char line[128];
    char *out = put_text(line, label);
    for (int i = 0; i < 3 && keys[i]; i++) {
        *out++ = ' ';
        out = put_text(out, keys[i]);
        *out++ = '=';
        out = put_uint(out, values[i]);
    }
    *out++ = '\n';
    *out = 0;
    vv_write(line);
}

static void print_status(const char *what, VvStatus s) {
    vv_write(what);
    vv_write(vv_status_name(s));
    vv_write(": ");
    vv_write(vv_status_message(s));
    vv_write("\n");
}

/* Time the calibration loop; print its ticks and instruction count. */
static void calibrate(uint32_t overhead) {
    uint32_t t0 = vv_clock_read();
    vv_clock_loop(VV_CALIBRATION_ITERATIONS);
    uint32_t ticks = vv_clock_span(t0, vv_clock_read()) - overhead;
    static const char *const keys[3] = {"loop_instructions", "ticks", "overhead_ticks"};
    const uint32_t values[3] = {2 * VV_CALIBRATION_ITERATIONS, ticks, overhead};
    print_fields("# calib", keys, values);
}

static void print_measurements(uint32_t steps, uint32_t ticks_hi, uint32_t ticks_lo) {
    static const char *const timing[3] = {"steps", "ticks_hi", "ticks_lo"};
    const uint32_t t[3] = {steps, ticks_hi, ticks_lo};
    print_fields("# timing", timing, t);
    static const char *const stack[3] = {"used", "size", NULL};
    const uint32_t s[3] = {vv_stack_used(), vv_stack_size(), 0};
    print_fields("# stack", stack, s);
}

int main(void) {
    static const uint8_t check[] = "123456789";
    char line[32] = "# crc32 ";
    *put_hex(line + 8, vv_crc32(check, 9)) = 0;
    vv_write(line);
    vv_write("\n");

    VvStatus s = vv_model_init(&model, __vv_model_start, (size_t)(__vv_model_end - __vv_model_start));
    if (s != VV_STATUS_OK) {
        print_status("refused: ", s);
        return 1;
    }
    vv_clock_start();
    uint32_t a = vv_clock_read();
    uint32_t overhead = vv_clock_span(a, vv_clock_read());
    calibrate(overhead);

    uint32_t n = vv_dof(&model);
    float q[VV_MAX_DOF] = {VV_Q_INIT}, p[VV_MAX_DOF] = {0};
    uint64_t ticks = 0;
    print_state(0, q, p, n);
    for (uint32_t k = 1; k <= VV_STEPS; k++) {
        uint32_t t0 = vv_clock_read();
        s = vv_step(&model, q, p, VV_MAX_DOF);
        uint32_t span = vv_clock_span(t0, vv_clock_read());
        ticks += span > overhead ? span - overhead : 0;
        if (s != VV_STATUS_OK) {
            print_status("step failed: ", s);
            return 1;
        }
        print_state(k, q, p, n);
    }
    print_measurements(VV_STEPS, (uint32_t)(ticks >> 32), (uint32_t)ticks);
    return 0;
}
