/* tl_wire.c - see tl_wire.h. */
#include "tl_wire.h"

#include <string.h>

void tl_writer_init(tl_writer *w, uint8_t *buf, size_t cap)
{
    w->buf = buf;
    w->cap = cap;
    w->len = 0;
    w->error = TL_OK;
}

int tl_writer_finish(const tl_writer *w)
{
    return w->error != TL_OK ? w->error : (int)w->len;
}

/* Room for n more bytes; sets TL_ERR_NO_ROOM otherwise. */
static int room(tl_writer *w, size_t n)
{
    if (w->error != TL_OK)
        return 0;
    if (w->cap - w->len < n) {
        w->error = TL_ERR_NO_ROOM;
        return 0;
    }
    return 1;
}

/* Integers up to 32 bits go through one 32-bit routine: cheaper on 32-bit cores than 64-bit
 * shifts; a u64 is written as two halves. */
static void put_le(tl_writer *w, uint32_t v, size_t n)
{
    size_t k;
    if (!room(w, n))
        return;
    for (k = 0; k < n; k++) {
        w->buf[w->len + k] = (uint8_t)(v & 0xFFu);
        v >>= 8;
    }
    w->len += n;
}

void tl_put_u8(tl_writer *w, uint8_t v) { put_le(w, v, 1); }
void tl_put_i8(tl_writer *w, int8_t v) { put_le(w, (uint8_t)v, 1); }
void tl_put_u16(tl_writer *w, uint16_t v) { put_le(w, v, 2); }
void tl_put_u32(tl_writer *w, uint32_t v) { put_le(w, v, 4); }
void tl_put_u64(tl_writer *w, uint64_t v)
{
    if (!room(w, 8))
        return;
    put_le(w, (uint32_t)(v & 0xFFFFFFFFu), 4);
    put_le(w, (uint32_t)(v >> 32), 4);
}

void tl_put_f32(tl_writer *w, float v)
{
    uint32_t bits;
    memcpy(&bits, &v, sizeof bits);
    put_le(w, bits, 4);
}

void tl_put_str(tl_writer *w, const char *data, size_t len, size_t max_len)
{
    if (w->error != TL_OK)
        return;
    if (len > max_len || len > 255u || !tl_utf8_valid((const uint8_t *)data, len)) {
        w->error = TL_ERR_TEXT;
        return;
    }
    if (!room(w, 1u + len))
        return;
    w->buf[w->len] = (uint8_t)len;
    if (len > 0u)
        memcpy(w->buf + w->len + 1u, data, len);
    w->len += 1u + len;
}

void tl_put_count(tl_writer *w, size_t count, size_t max_items)
{
    if (w->error != TL_OK)
        return;
    if (count > max_items || count > 255u) {
        w->error = TL_ERR_LIST;
        return;
    }
    put_le(w, (uint32_t)count, 1);
}

void tl_reader_init(tl_reader *r, const uint8_t *buf, size_t len)
{
    r->buf = buf;
    r->len = len;
    r->pos = 0;
    r->error = TL_OK;
}

static uint32_t get_le(tl_reader *r, size_t n)
{
    uint32_t v = 0;
    size_t k;
    if (r->error != TL_OK)
        return 0;
    if (r->len - r->pos < n) {
        r->error = TL_ERR_MALFORMED;
        return 0;
    }
    for (k = n; k > 0u; k--)
        v = (v << 8) | r->buf[r->pos + k - 1u];
    r->pos += n;
    return v;
}

uint8_t tl_get_u8(tl_reader *r) { return (uint8_t)get_le(r, 1); }
uint16_t tl_get_u16(tl_reader *r) { return (uint16_t)get_le(r, 2); }
uint32_t tl_get_u32(tl_reader *r) { return (uint32_t)get_le(r, 4); }
uint64_t tl_get_u64(tl_reader *r)
{
    uint64_t lo, hi;
    if (r->error == TL_OK && r->len - r->pos < 8u) { /* all or nothing, like every field */
        r->error = TL_ERR_MALFORMED;
        return 0;
    }
    lo = get_le(r, 4);
    hi = get_le(r, 4);
    return lo | (hi << 32);
}

int8_t tl_get_i8(tl_reader *r)
{
    int v = (int)get_le(r, 1);
    /* two's complement without relying on the implementation-defined narrowing conversion */
    return (int8_t)(v >= 128 ? v - 256 : v);
}

float tl_get_f32(tl_reader *r)
{
    uint32_t bits = get_le(r, 4);
    float v;
    memcpy(&v, &bits, sizeof v);
    return v;
}

void tl_get_str(tl_reader *r, char *dst, uint8_t *len_out, size_t max_len)
{
    size_t n = get_le(r, 1);
    dst[0] = '\0';
    *len_out = 0;
    if (r->error != TL_OK)
        return;
    if (n > max_len || r->len - r->pos < n || !tl_utf8_valid(r->buf + r->pos, n)) {
        r->error = TL_ERR_MALFORMED;
        return;
    }
    if (n > 0u)
        memcpy(dst, r->buf + r->pos, n);
    dst[n] = '\0';
    *len_out = (uint8_t)n;
    r->pos += n;
}

uint8_t tl_get_count(tl_reader *r, size_t max_items, size_t item_size)
{
    size_t n = get_le(r, 1);
    if (r->error != TL_OK)
        return 0;
    if (n > max_items || (r->len - r->pos) / item_size < n) {
        r->error = TL_ERR_MALFORMED;
        return 0;
    }
    return (uint8_t)n;
}

int tl_utf8_valid(const uint8_t *s, size_t n)
{
    size_t i = 0;
    while (i < n) {
        uint8_t c = s[i];
        uint8_t lo = 0x80u, hi = 0xBFu; /* allowed range of the second byte */
        size_t need, k;
        if (c < 0x80u) {
            i++;
            continue;
        }
        if (c >= 0xC2u && c <= 0xDFu) {
            need = 1;
        } else if (c == 0xE0u) {
            need = 2;
            lo = 0xA0u; /* no overlong three-byte forms */
        } else if (c == 0xEDu) {
            need = 2;
            hi = 0x9Fu; /* no surrogates U+D800..U+DFFF */
        } else if (c >= 0xE1u && c <= 0xEFu) {
            need = 2;
        } else if (c == 0xF0u) {
            need = 3;
            lo = 0x90u; /* no overlong four-byte forms */
        } else if (c >= 0xF1u && c <= 0xF3u) {
            need = 3;
        } else if (c == 0xF4u) {
            need = 3;
            hi = 0x8Fu; /* nothing above U+10FFFF */
        } else {
            return 0; /* continuation byte, C0, C1 or F5..FF as a lead byte */
        }
        if (n - i - 1u < need || s[i + 1u] < lo || s[i + 1u] > hi)
            return 0;
        for (k = 2; k <= need; k++)
            if ((s[i + k] & 0xC0u) != 0x80u)
                return 0;
        i += need + 1u;
    }
    return 1;
}
