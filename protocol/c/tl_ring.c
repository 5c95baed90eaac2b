/* tl_ring.c - see tl_ring.h for the single-producer single-consumer rules. */
#include "tl_ring.h"

#define RING_MASK ((tl_ring_index)(TL_RING_SIZE - 1u))

void tl_ring_init(tl_ring *r)
{
    r->head = 0;
    r->tail = 0;
    r->dropped = 0;
}

int tl_ring_push(tl_ring *r, uint8_t byte)
{
    tl_ring_index head = r->head;
    tl_ring_index tail = r->tail; /* one read of the consumer's index */
    if ((tl_ring_index)(head - tail) >= TL_RING_SIZE) {
        r->dropped = r->dropped + 1u;
        return 0;
    }
    r->data[head & RING_MASK] = byte;
    r->head = (tl_ring_index)(head + 1u); /* publish after the byte is stored */
    return 1;
}

int tl_ring_pop(tl_ring *r, uint8_t *byte)
{
    tl_ring_index tail = r->tail;
    if (tail == r->head) /* one read of the producer's index */
        return 0;
    *byte = r->data[tail & RING_MASK];
    r->tail = (tl_ring_index)(tail + 1u); /* release the slot after the byte is read */
    return 1;
}

size_t tl_ring_count(const tl_ring *r)
{
    tl_ring_index tail = r->tail;
    tl_ring_index head = r->head;
    return (size_t)(tl_ring_index)(head - tail);
}
