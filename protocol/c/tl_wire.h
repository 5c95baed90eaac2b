/* tl_wire.h - status codes and little-endian field access for the tetherloop wire protocol.
 *
 * Part of the portable C99 board side (protocol/c/). Pure: no allocation, no I/O, no global state.
 * Every multi-byte field on the wire is little-endian with no padding or alignment (SPEC.md
 * sections 1 and 7), so fields are stored and loaded byte by byte, never by casting a pointer
 * into a buffer to a struct.
 *
 * The writer and the reader carry a sticky error flag: after the first field that does not fit
 * (or a text or list out of its wire range) every later call does nothing, and the caller checks
 * once at the end. This keeps the generated per-message code straight-line and small.
 */
#ifndef TL_WIRE_H
#define TL_WIRE_H

#include <stddef.h>
#include <stdint.h>

/* Return codes of the library: 0 is success, failures are negative. */
enum tl_status {
    TL_OK = 0,
    TL_ERR_MALFORMED = -1,     /* payload does not decode: a field runs past the end, a count
                                  above its maximum, a text that is not UTF-8 */
    TL_ERR_UNKNOWN_TYPE = -2,  /* type id not in the message table */
    TL_ERR_NO_ROOM = -3,       /* the output buffer is too small */
    TL_ERR_TEXT = -4,          /* encoding: a text longer than its wire limit or not UTF-8 */
    TL_ERR_LIST = -5,          /* encoding: a list with more items than its wire limit */
    TL_ERR_TOO_LONG = -6       /* encoding: the payload exceeds the protocol's maximum */
};

/* Binary32 floats are copied bit for bit; the library needs float to be IEEE-754 binary32. */
typedef char tl_float_is_binary32[(sizeof(float) == 4u) ? 1 : -1];

/* ------------------------------------------------------------------ writer */

typedef struct {
    uint8_t *buf;
    size_t cap;
    size_t len;
    int error; /* TL_OK or the first failure */
} tl_writer;

void tl_writer_init(tl_writer *w, uint8_t *buf, size_t cap);
/* Length written, or the first error (negative). */
int tl_writer_finish(const tl_writer *w);
void tl_put_u8(tl_writer *w, uint8_t v);
void tl_put_i8(tl_writer *w, int8_t v);
void tl_put_u16(tl_writer *w, uint16_t v);
void tl_put_u32(tl_writer *w, uint32_t v);
void tl_put_u64(tl_writer *w, uint64_t v);
void tl_put_f32(tl_writer *w, float v);
/* A text field: u8 byte count then the bytes. len above max_len or invalid UTF-8: TL_ERR_TEXT. */
void tl_put_str(tl_writer *w, const char *data, size_t len, size_t max_len);
/* A list's item count; above max_items: TL_ERR_LIST. The caller then writes the items. */
void tl_put_count(tl_writer *w, size_t count, size_t max_items);

/* ------------------------------------------------------------------ reader */

typedef struct {
    const uint8_t *buf;
    size_t len;
    size_t pos;
    int error; /* TL_OK or TL_ERR_MALFORMED */
} tl_reader;

void tl_reader_init(tl_reader *r, const uint8_t *buf, size_t len);
/* Each getter returns 0 (and sets the error) when the field does not fit. */
uint8_t tl_get_u8(tl_reader *r);
int8_t tl_get_i8(tl_reader *r);
uint16_t tl_get_u16(tl_reader *r);
uint32_t tl_get_u32(tl_reader *r);
uint64_t tl_get_u64(tl_reader *r);
float tl_get_f32(tl_reader *r);
/* A text field into dst (room for max_len + 1 bytes; always NUL-terminated, though the text may
 * itself hold NUL characters: *len_out is authoritative). Count above max_len, bytes past the end
 * or invalid UTF-8: error, empty text. */
void tl_get_str(tl_reader *r, char *dst, uint8_t *len_out, size_t max_len);
/* A list's item count, checked against max_items and against the bytes left for count items of
 * item_size bytes each; on failure the error is set and 0 returned. */
uint8_t tl_get_count(tl_reader *r, size_t max_items, size_t item_size);

/* ------------------------------------------------------------------ helpers */

/* 1 when data[0..n) is well-formed UTF-8 (Unicode 15, table 3-7: no overlong forms, no
 * surrogates, nothing above U+10FFFF), else 0. */
int tl_utf8_valid(const uint8_t *data, size_t n);

#endif /* TL_WIRE_H */
