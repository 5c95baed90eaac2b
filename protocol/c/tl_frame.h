/* tl_frame.h - frames of the tetherloop protocol: encoding and the bounded stream decoder.
 *
 * On the wire (SPEC.md section 3):  COBS( header(5) | payload(0..240) | crc32_le(4) ) 0x00
 * header = version u8 (major << 4 | minor), type u8, seq u16 LE, flags u8; the CRC-32/ISO-HDLC
 * covers header and payload.
 *
 * Receiving, theory of operation (SPEC.md section 6). The decoder keeps one buffer of
 * TL_MAX_ENCODED (250) bytes and a discarding flag, and takes one byte at a time:
 * - 0x00 ends a piece. When discarding, the flag is cleared and nothing is decoded; an empty
 *   piece is ignored; any other piece is decoded in place and counted in exactly one counter.
 * - another byte is appended; the 251st byte of a piece makes it oversize: the buffer is dropped,
 *   counted, and bytes are discarded up to the next 0x00.
 * So whatever garbage arrives, the first 0x00 after it ends the bad piece and the next frame is
 * received intact, and a stream without zeros never grows the buffer. The decoder never stops,
 * never resets itself and has no other state.
 *
 * Decoding a piece, in this order, each failure counted once: COBS (bad_cobs), at least 9 bytes
 * (too_short; SPEC's counter "short", a C keyword), CRC (bad_crc), then the frame is handed up:
 * another protocol major or a type id the table does not know (unknown_type; the raw payload is
 * handed up so that a device can refuse it), a payload that does not decode (malformed, handed up
 * with its header so that a device can refuse it by seq), else good.
 */
#ifndef TL_FRAME_H
#define TL_FRAME_H

#include <stddef.h>
#include <stdint.h>

#include "tl_messages.h"
#include "tl_ring.h"

/* ------------------------------------------------------------------ encoding */

/* Whole on-wire frame (COBS, delimiter included) from a raw payload: for a device's own replies
 * and for relaying frames of types this build does not decode. Returns the number of bytes
 * written to out (at most TL_MAX_WIRE), or TL_ERR_TOO_LONG (payload above TL_MAX_PAYLOAD) or
 * TL_ERR_NO_ROOM. */
int tl_frame_encode(uint8_t version, uint8_t type_id, uint16_t seq, uint8_t flags,
                    const uint8_t *payload, size_t payload_len, uint8_t *out, size_t cap);

/* Whole on-wire frame of m in this table's version (TL_VERSION_BYTE). out needs TL_MAX_WIRE
 * bytes at most. Returns the length, or a negative tl_status from tl_encode_payload or
 * tl_frame_encode. Uses about TL_MAX_RAW bytes of stack. */
int tl_encode_message(const tl_message *m, uint16_t seq, uint8_t flags, uint8_t *out,
                      size_t cap);

/* ------------------------------------------------------------------ decoding */

typedef struct {
    uint32_t good;
    uint32_t bad_crc;
    uint32_t bad_cobs;
    uint32_t too_short;    /* SPEC.md's "short" */
    uint32_t oversize;
    uint32_t malformed;
    uint32_t unknown_type; /* unknown type id or another major */
    uint32_t bytes_in;     /* every byte taken, wraps */
} tl_decoder_stats;

/* What a handed-up frame is. */
enum tl_frame_kind {
    TL_FRAME_GOOD = 0,         /* msg holds the decoded message */
    TL_FRAME_UNKNOWN_TYPE = 1, /* type id not in the table; payload holds the raw payload */
    TL_FRAME_OTHER_MAJOR = 2,  /* the header's major differs from TL_PROTOCOL_MAJOR */
    TL_FRAME_MALFORMED = 3     /* known type, payload did not decode */
};

typedef struct {
    uint8_t kind;              /* enum tl_frame_kind */
    uint8_t version;           /* header byte 0 as received */
    uint8_t type_id;
    uint8_t flags;
    uint16_t seq;
    uint8_t payload_len;
    const uint8_t *payload;    /* raw payload inside the decoder's buffer: valid until the next
                                  byte is given to the decoder */
    tl_message msg;            /* decoded message when kind == TL_FRAME_GOOD */
} tl_frame;

typedef struct {
    uint8_t buf[TL_MAX_ENCODED];
    uint16_t len;              /* bytes of the piece so far, never above TL_MAX_ENCODED */
    uint8_t discarding;        /* dropping an oversize piece up to the next 0x00 */
    tl_decoder_stats stats;
} tl_decoder;

void tl_decoder_init(tl_decoder *d);

/* Take one byte. Returns 1 when it completed a frame that is handed up (written to *out, which
 * stays valid until the next byte), else 0. Never fails. */
int tl_decoder_push(tl_decoder *d, uint8_t byte, tl_frame *out);

/* Take bytes from data[0..n) up to and including the first that completes a frame. Sets *used to
 * the number of bytes taken and returns 1 with the frame in *out, or takes all n and returns 0.
 * For links that deliver blocks (DMA, a USB packet, a test driver). */
int tl_decoder_feed(tl_decoder *d, const uint8_t *data, size_t n, size_t *used, tl_frame *out);

/* Tick side of the interrupt-driven receive path: pop bytes from the ring into the decoder until
 * a frame is complete (returns 1, frame in *out) or the ring is empty (returns 0). Call it in a
 * loop from the control tick: while (tl_rx_poll(&ring, &dec, &frame)) handle(&frame); */
int tl_rx_poll(tl_ring *r, tl_decoder *d, tl_frame *out);

#endif /* TL_FRAME_H */
