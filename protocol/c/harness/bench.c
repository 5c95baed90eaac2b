/* bench.c - host timing of the receive path for tests/bench/c_board.py.
 *
 * Host program, not part of the library. Usage: bench N
 * For N rounds: a 4-axis Telemetry frame (values change every round) is pushed into the ring as
 * the interrupt would, then the time of tl_rx_poll (ring -> decoder -> decoded tl_message) until
 * the frame is out is taken with CLOCK_MONOTONIC. Also times tl_encode_message of the same frame.
 * Prints one JSON object with the median and the 99th percentile of the per-round times, in
 * microseconds.
 */
#define _POSIX_C_SOURCE 199309L

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "tl_frame.h"

static double now_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec * 1e9 + (double)ts.tv_nsec;
}

static int cmp_double(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

static double quantile(const double *sorted, size_t n, double q)
{
    size_t k = (size_t)(q * (double)(n - 1u) + 0.5);
    return sorted[k];
}

static void telemetry(tl_message *m, unsigned long k)
{
    unsigned a;
    memset(m, 0, sizeof *m);
    m->type_id = TL_MSG_TELEMETRY;
    m->body.telemetry.time_us = 2500ull * k;
    m->body.telemetry.counter = (uint32_t)k;
    m->body.telemetry.state = TL_DEVICE_STATE_RUNNING;
    m->body.telemetry.tag = 7;
    m->body.telemetry.axes.count = 4;
    for (a = 0; a < 4u; a++) {
        tl_axis_sample *s = &m->body.telemetry.axes.items[a];
        s->axis = (uint8_t)a;
        s->loop = TL_LOOP_RATE;
        s->setpoint = 0.25f * (float)a;
        s->measurement = (float)(k % 997u) / 1024.0f - 0.25f;
        s->output = -(float)(k % 499u) / 512.0f;
        s->relay = (int8_t)((k & 8u) ? 1 : -1);
    }
}

int main(int argc, char **argv)
{
    unsigned long n = argc > 1 ? strtoul(argv[1], NULL, 10) : 100000ul, k;
    double *dec = malloc(n * sizeof *dec), *enc = malloc(n * sizeof *enc), t0;
    static tl_ring ring;
    static tl_decoder d;
    static tl_frame f;
    tl_message m;
    uint8_t wire[TL_MAX_WIRE];
    unsigned long got = 0;
    int len = 0, i;
    if (dec == NULL || enc == NULL || n == 0u)
        return 2;
    tl_ring_init(&ring);
    tl_decoder_init(&d);
    for (k = 0; k < n; k++) {
        telemetry(&m, k);
        t0 = now_ns();
        len = tl_encode_message(&m, (uint16_t)k, 0u, wire, sizeof wire);
        enc[k] = now_ns() - t0;
        if (len < 0)
            return 3;
        for (i = 0; i < len; i++)
            tl_ring_push(&ring, wire[i]);
        t0 = now_ns();
        got += (unsigned long)tl_rx_poll(&ring, &d, &f);
        dec[k] = now_ns() - t0;
    }
    if (got != n || d.stats.good != n)
        return 4;
    qsort(dec, n, sizeof *dec, cmp_double);
    qsort(enc, n, sizeof *enc, cmp_double);
    printf("{\"frames\": %lu, \"frame_bytes\": %d, \"decode_us_median\": %.4f, "
           "\"decode_us_p99\": %.4f, \"encode_us_median\": %.4f, \"encode_us_p99\": %.4f}\n",
           n, len, quantile(dec, n, 0.5) / 1e3, quantile(dec, n, 0.99) / 1e3,
           quantile(enc, n, 0.5) / 1e3, quantile(enc, n, 0.99) / 1e3);
    free(dec);
    free(enc);
    return 0;
}
