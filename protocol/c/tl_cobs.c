/* tl_cobs.c - see tl_cobs.h. */
#include "tl_cobs.h"

size_t tl_cobs_encode(const uint8_t *src, size_t n, uint8_t *dst, size_t cap)
{
    size_t code_at = 0, out = 1, i;
    uint8_t code = 1;
    if (cap < TL_COBS_MAX_ENCODED(n))
        return 0;
    for (i = 0; i < n; i++) {
        if (src[i] == 0u) {
            dst[code_at] = code;
            code_at = out++;
            code = 1;
        } else {
            dst[out++] = src[i];
            code++;
            if (code == 0xFFu && i + 1u < n) {
                dst[code_at] = code;
                code_at = out++;
                code = 1;
            }
        }
    }
    dst[code_at] = code;
    return out;
}

long tl_cobs_decode(const uint8_t *src, size_t n, uint8_t *dst)
{
    size_t i = 0, out = 0, k;
    while (i < n) {
        uint8_t code = src[i];
        if (code == 0u || code > n - i)
            return -1; /* a zero byte, or a block past the end */
        for (k = 1; k < code; k++) {
            uint8_t b = src[i + k];
            if (b == 0u)
                return -1;
            dst[out++] = b;
        }
        i += code;
        if (code != 0xFFu && i < n)
            dst[out++] = 0u;
    }
    return (long)out;
}
