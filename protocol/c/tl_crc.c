/* tl_crc.c - see tl_crc.h. */
#include "tl_crc.h"

/* Entry k: the reflected CRC register after shifting the 4-bit value k through the polynomial
 * 0xEDB88320 four times (one step of the bitwise reference per bit). */
static const uint32_t nibble_table[16] = {
    0x00000000u, 0x1DB71064u, 0x3B6E20C8u, 0x26D930ACu,
    0x76DC4190u, 0x6B6B51F4u, 0x4DB26158u, 0x5005713Cu,
    0xEDB88320u, 0xF00F9344u, 0xD6D6A3E8u, 0xCB61B38Cu,
    0x9B64C2B0u, 0x86D3D2D4u, 0xA00AE278u, 0xBDBDF21Cu
};

uint32_t tl_crc32_update(uint32_t state, const uint8_t *data, size_t n)
{
    size_t i;
    for (i = 0; i < n; i++) {
        state ^= data[i];
        state = (state >> 4) ^ nibble_table[state & 0x0Fu];
        state = (state >> 4) ^ nibble_table[state & 0x0Fu];
    }
    return state;
}

uint32_t tl_crc32(const uint8_t *data, size_t n)
{
    return tl_crc32_update(TL_CRC32_INIT, data, n) ^ TL_CRC32_XOROUT;
}
