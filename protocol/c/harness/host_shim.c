/* host_shim.c - layout facts for the host's ctypes binding (protocol/c/binding.py).
 *
 * Compiled into the host's shared library only, never into a board: the binding compares these
 * with its own ctypes layouts when it loads the library, so a mismatch is an error at load time
 * rather than wrong field values later.
 */
#include <stddef.h>

#include "tl_frame.h"

size_t tl_host_layout(int what);

size_t tl_host_layout(int what)
{
    switch (what) {
    case 0: return sizeof(tl_message);
    case 1: return offsetof(tl_message, body);
    case 2: return sizeof(tl_frame);
    case 3: return offsetof(tl_frame, msg);
    case 4: return sizeof(tl_decoder);
    case 5: return offsetof(tl_decoder, stats);
    case 6: return sizeof(tl_ring);
    case 7: return offsetof(tl_ring, data);
    case 8: return (size_t)TL_RING_SIZE;
    default: return 0;
    }
}
