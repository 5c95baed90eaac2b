/* tl_frame.c - see tl_frame.h. */
#include "tl_frame.h"

#include <string.h>

#include "tl_cobs.h"
#include "tl_crc.h"

#define MIN_RAW (TL_HEADER_BYTES + TL_CRC_BYTES)

typedef char tl_raw_fits_cobs_without_ff[(TL_MAX_RAW < 254u) ? 1 : -1];

/* Header, CRC and COBS around a payload already at raw + TL_HEADER_BYTES. */
static int finish_frame(uint8_t *raw, uint8_t version, uint8_t type_id, uint16_t seq,
                        uint8_t flags, size_t payload_len, uint8_t *out, size_t cap)
{
    size_t body = TL_HEADER_BYTES + payload_len, n;
    uint32_t crc;
    raw[0] = version;
    raw[1] = type_id;
    raw[2] = (uint8_t)(seq & 0xFFu);
    raw[3] = (uint8_t)(seq >> 8);
    raw[4] = flags;
    crc = tl_crc32(raw, body);
    raw[body + 0u] = (uint8_t)(crc & 0xFFu);
    raw[body + 1u] = (uint8_t)((crc >> 8) & 0xFFu);
    raw[body + 2u] = (uint8_t)((crc >> 16) & 0xFFu);
    raw[body + 3u] = (uint8_t)(crc >> 24);
    if (cap < 1u)
        return TL_ERR_NO_ROOM;
    n = tl_cobs_encode(raw, body + TL_CRC_BYTES, out, cap - 1u);
    if (n == 0u)
        return TL_ERR_NO_ROOM;
    out[n] = 0u; /* the delimiter */
    return (int)(n + 1u);
}

int tl_frame_encode(uint8_t version, uint8_t type_id, uint16_t seq, uint8_t flags,
                    const uint8_t *payload, size_t payload_len, uint8_t *out, size_t cap)
{
    uint8_t raw[TL_MAX_RAW];
    if (payload_len > TL_MAX_PAYLOAD)
        return TL_ERR_TOO_LONG;
    if (payload_len > 0u)
        memcpy(raw + TL_HEADER_BYTES, payload, payload_len);
    return finish_frame(raw, version, type_id, seq, flags, payload_len, out, cap);
}

int tl_encode_message(const tl_message *m, uint16_t seq, uint8_t flags, uint8_t *out,
                      size_t cap)
{
    uint8_t raw[TL_MAX_RAW];
    /* the payload area is exactly TL_MAX_PAYLOAD bytes: running out of it means too long */
    int n = tl_encode_payload(m, raw + TL_HEADER_BYTES, TL_MAX_PAYLOAD);
    if (n == TL_ERR_NO_ROOM)
        return TL_ERR_TOO_LONG;
    if (n < 0)
        return n;
    return finish_frame(raw, TL_VERSION_BYTE, m->type_id, seq, flags, (size_t)n, out, cap);
}

void tl_decoder_init(tl_decoder *d)
{
    memset(d, 0, sizeof *d);
}

/* Decode the complete piece in d->buf; returns 1 when a frame is handed up in *out. */
static int decode_piece(tl_decoder *d, tl_frame *out)
{
    tl_decoder_stats *s = &d->stats;
    long n = tl_cobs_decode(d->buf, d->len, d->buf); /* in place */
    int rc;
    if (n < 0) {
        s->bad_cobs++;
        return 0;
    }
    if (n < (long)MIN_RAW) {
        s->too_short++;
        return 0;
    }
    if (tl_crc32(d->buf, (size_t)n) != TL_CRC32_GOOD_RESIDUE) {
        s->bad_crc++;
        return 0;
    }
    out->version = d->buf[0];
    out->type_id = d->buf[1];
    out->seq = (uint16_t)(d->buf[2] | (d->buf[3] << 8));
    out->flags = d->buf[4];
    out->payload = d->buf + TL_HEADER_BYTES;
    out->payload_len = (uint8_t)((size_t)n - MIN_RAW); /* at most 240: the piece held <= 250 */
    if ((out->version >> 4) != TL_PROTOCOL_MAJOR) {
        out->kind = TL_FRAME_OTHER_MAJOR;
        s->unknown_type++;
        return 1;
    }
    rc = tl_decode_payload(out->type_id, out->payload, out->payload_len, &out->msg);
    if (rc == TL_ERR_UNKNOWN_TYPE) {
        out->kind = TL_FRAME_UNKNOWN_TYPE;
        s->unknown_type++;
    } else if (rc != TL_OK) {
        out->kind = TL_FRAME_MALFORMED;
        s->malformed++;
    } else {
        out->kind = TL_FRAME_GOOD;
        s->good++;
    }
    return 1;
}

int tl_decoder_push(tl_decoder *d, uint8_t byte, tl_frame *out)
{
    d->stats.bytes_in++;
    if (byte == 0u) {
        int handed_up = 0;
        if (d->discarding)
            d->discarding = 0;
        else if (d->len > 0u)
            handed_up = decode_piece(d, out);
        d->len = 0;
        return handed_up;
    }
    if (d->discarding)
        return 0;
    if (d->len >= TL_MAX_ENCODED) {
        d->len = 0;
        d->discarding = 1;
        d->stats.oversize++;
        return 0;
    }
    d->buf[d->len++] = byte;
    return 0;
}

int tl_decoder_feed(tl_decoder *d, const uint8_t *data, size_t n, size_t *used, tl_frame *out)
{
    size_t i;
    for (i = 0; i < n; i++) {
        if (tl_decoder_push(d, data[i], out)) {
            *used = i + 1u;
            return 1;
        }
    }
    *used = n;
    return 0;
}

int tl_rx_poll(tl_ring *r, tl_decoder *d, tl_frame *out)
{
    uint8_t byte;
    while (tl_ring_pop(r, &byte))
        if (tl_decoder_push(d, byte, out))
            return 1;
    return 0;
}
