/* tl_crc.h - CRC-32/ISO-HDLC, the frame check of the tetherloop protocol (SPEC.md section 4).
 *
 * Parameters in the model of Williams (1993), "A painless guide to CRC error detection
 * algorithms", as catalogued: width 32, poly 0x04C11DB7 (reflected 0xEDB88320), init 0xFFFFFFFF,
 * refin and refout true, xorout 0xFFFFFFFF, check 0xCBF43926, residue 0xDEBB20E3.
 *
 * The implementation processes four bits per step with a 16-entry table (64 bytes of constant
 * data): two table look-ups per byte instead of eight shift-and-xor steps, without the 1 KiB of a
 * byte-wide table.
 */
#ifndef TL_CRC_H
#define TL_CRC_H

#include <stddef.h>
#include <stdint.h>

#define TL_CRC32_INIT 0xFFFFFFFFu
#define TL_CRC32_XOROUT 0xFFFFFFFFu
#define TL_CRC32_CHECK 0xCBF43926u /* CRC of the ASCII bytes "123456789" */
/* tl_crc32 over data followed by its own CRC (little-endian) gives this constant exactly when the
 * CRC is right: the catalogue's residue 0xDEBB20E3 XOR xorout. */
#define TL_CRC32_GOOD_RESIDUE 0x2144DF1Cu

/* Running form: state = TL_CRC32_INIT; state = tl_crc32_update(state, p, n) ...;
 * crc = state ^ TL_CRC32_XOROUT. */
uint32_t tl_crc32_update(uint32_t state, const uint8_t *data, size_t n);

/* CRC-32/ISO-HDLC of data[0..n). */
uint32_t tl_crc32(const uint8_t *data, size_t n);

#endif /* TL_CRC_H */
