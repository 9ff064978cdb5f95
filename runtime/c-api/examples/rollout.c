/* Step a Visviva model through the C interface and print every state as
 * exact f32 bit patterns, one line per step: "k q1 .. qn p1 .. pn".
 * Usage: rollout BLOB.vvb STEPS Q1 [Q2 ..]  (momenta start at 0; undriven
 * models). A refused blob: "BLOB: refused: <status name>: <message>" on
 * stderr and exit 1. A first line "# crc32 0x..." gives the library's
 * CRC-32 of the catalogue's check string "123456789". `cargo xtask c-check`
 * compares the output with `visviva rollout --bits`. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include "visviva.h"

static VvModel model; /* zeroed, allocated statically: no heap in the library */

static void print_state(long k, const float *q, const float *p, unsigned n) {
    printf("%ld", k);
    for (unsigned i = 0; i < 2 * n; i++) {
        float v = i < n ? q[i] : p[i - n];
        unsigned int bits;
        memcpy(&bits, &v, sizeof bits);
        printf(" 0x%08x", bits);
    }
    printf("\n");
}

int main(int argc, char **argv) {
    if (argc < 4) {
        fprintf(stderr, "usage: %s BLOB STEPS Q1 [Q2 ..]\n", argv[0]);
        return 2;
    }
    static unsigned char blob[1 << 20];
    FILE *f = fopen(argv[1], "rb");
    if (!f) { perror(argv[1]); return 2; }
    size_t len = fread(blob, 1, sizeof blob, f);
    fclose(f);

    const char *check = "123456789"; /* the CRC catalogue's check string */
    printf("# crc32 0x%08x\n", (unsigned)vv_crc32((const uint8_t *)check, strlen(check)));

    VvStatus s = vv_model_init(&model, blob, len);
    if (s != VV_STATUS_OK) {
        fprintf(stderr, "%s: refused: %s: %s\n", argv[1], vv_status_name(s), vv_status_message(s));
        return 1;
    }
    unsigned n = vv_dof(&model);
    float q[VV_MAX_DOF] = {0}, p[VV_MAX_DOF] = {0};
    for (unsigned i = 0; i < n && 3 + (int)i < argc; i++) q[i] = strtof(argv[3 + i], NULL);
    long steps = strtol(argv[2], NULL, 10);
    print_state(0, q, p, n);
    for (long k = 1; k <= steps; k++) {
        s = vv_step(&model, q, p, VV_MAX_DOF);
        if (s != VV_STATUS_OK) {
            fprintf(stderr, "step %ld: %s: %s\n", k, vv_status_name(s), vv_status_message(s));
            return 1;
        }
        print_state(k, q, p, n);
    }
    return 0;
}
