/* tl_ring.h - receive ring between the UART interrupt and the control tick.
 *
 * Theory of operation. One producer (the receive interrupt, or a DMA-complete handler) pushes
 * bytes; one consumer (the control tick) pops them and feeds the frame decoder. No lock is needed
 * because each index has exactly one writer: the producer writes only `head`, the consumer
 * writes only `tail`, and each reads the other's index once per call. Both indices run freely
 * (modulo the range of tl_ring_index) and the slot is the index masked by TL_RING_SIZE - 1, so
 * all TL_RING_SIZE slots are used and `head - tail` is the fill level.
 *
 * The producer stores the byte before it publishes the new `head`; the consumer reads the byte
 * after it has read `head`. The slots and the indices are volatile, so the compiler keeps these
 * accesses in program order. That is sufficient on a single-core microcontroller (the interrupt
 * and the main loop run on the same core, which sees its own stores in order). On a multi-core
 * system with threads use C11 atomics with release/acquire ordering instead.
 *
 * tl_ring_index must be read and written by the CPU in one access (uint16_t on 16- and 32-bit
 * cores; define TL_RING_INDEX_T as uint8_t with TL_RING_SIZE <= 128 on 8-bit cores). When the
 * ring is full, a pushed byte is dropped and counted: the frame it belonged to then fails its CRC
 * and is counted by the decoder, and the decoder resynchronises at the next 0x00.
 */
#ifndef TL_RING_H
#define TL_RING_H

#include <stddef.h>
#include <stdint.h>

#ifndef TL_RING_SIZE
#define TL_RING_SIZE 256u
#endif
#ifndef TL_RING_INDEX_T
#define TL_RING_INDEX_T uint16_t
#endif

#if (TL_RING_SIZE < 2) || ((TL_RING_SIZE & (TL_RING_SIZE - 1u)) != 0)
#error "TL_RING_SIZE must be a power of two, at least 2"
#endif

typedef TL_RING_INDEX_T tl_ring_index;

/* The free-running indices must be able to count to twice the size. */
typedef char tl_ring_size_fits_index[
    ((tl_ring_index)-1 >= (2u * (unsigned long)TL_RING_SIZE - 1u)) ? 1 : -1];

typedef struct {
    volatile tl_ring_index head;   /* bytes pushed; written by the producer only */
    volatile tl_ring_index tail;   /* bytes popped; written by the consumer only */
    volatile uint32_t dropped;     /* bytes lost to a full ring; written by the producer only */
    volatile uint8_t data[TL_RING_SIZE];
} tl_ring;

/* Empty the ring. Call before the interrupt is enabled. */
void tl_ring_init(tl_ring *r);

/* Producer (interrupt) side: store one byte. Returns 1, or 0 when the ring was full (the byte is
 * dropped and counted in `dropped`). Constant time, no loop. */
int tl_ring_push(tl_ring *r, uint8_t byte);

/* Consumer (tick) side: take the oldest byte. Returns 1, or 0 when the ring is empty. */
int tl_ring_pop(tl_ring *r, uint8_t *byte);

/* Bytes waiting (a snapshot: the producer may add more at any moment). */
size_t tl_ring_count(const tl_ring *r);

#endif /* TL_RING_H */
