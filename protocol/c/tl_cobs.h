/* tl_cobs.h - Consistent Overhead Byte Stuffing with 0x00 as the frame delimiter.
 *
 * Cheshire, S., Baker, M. (1999). Consistent Overhead Byte Stuffing. IEEE/ACM Transactions on
 * Networking 7(2). SPEC.md section 5 states the rules used here: each run of non-zero bytes
 * becomes a code byte (run length + 1) followed by the run; the code byte stands for "these bytes,
 * then one 0x00", the 0x00 implied after the last run is dropped, and a run of 254 non-zero bytes
 * is written with code 0xFF, which implies no 0x00 after it.
 */
#ifndef TL_COBS_H
#define TL_COBS_H

#include <stddef.h>
#include <stdint.h>

/* Largest encoding of n bytes: one code byte per started 254-byte block. */
#define TL_COBS_MAX_ENCODED(n) ((n) + 1u + (n) / 254u)

/* Encode src[0..n) into dst (room for cap bytes; src and dst must not overlap). The result holds
 * no 0x00 and no delimiter. Returns the encoded length (at least 1), or 0 when cap is too small. */
size_t tl_cobs_encode(const uint8_t *src, size_t n, uint8_t *dst, size_t cap);

/* Decode src[0..n) (one frame without its delimiter) into dst; dst may equal src (in place: the
 * decoded bytes never overtake the encoded ones). Returns the decoded length, or -1 when the
 * input is not a COBS encoding (a 0x00 byte, or a block that runs past the end). n must be below
 * INT_MAX. */
long tl_cobs_decode(const uint8_t *src, size_t n, uint8_t *dst);

#endif /* TL_COBS_H */
