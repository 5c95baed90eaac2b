/* fuzz.c - randomised test of the C receive path, meant to run under ASan and UBSan.
 *
 * Host program, not part of the library (it uses stdio and malloc). Usage: fuzz N [SEED]
 * Prints one line "fuzz inputs=N failures=F ..." and exits 0 only when nothing failed.
 *
 * One input is one byte sequence of a randomly chosen kind: random bytes with a random share of
 * zeros; a valid frame of a random message, mutated 0..4 times (bit flip, byte overwritten,
 * truncated, a byte deleted or inserted, a zero inserted, a stretch repeated); several frames with
 * garbage between them; a long run without zeros; a frame of a random type id, version and
 * payload. Inputs reach the decoder through the interrupt ring (random chunk sizes, sometimes
 * overfilled on purpose) or byte by byte. Checked after every input:
 * - the decoder's piece length never exceeds TL_MAX_ENCODED (checked after every byte on the
 *   byte-by-byte path);
 * - the counters move exactly as an independent model of the piece splitting says: one counter
 *   per completed piece, one oversize per discarded run, bytes_in per byte;
 * - every frame handed up as good re-encodes to a prefix of its own payload, and an unmutated
 *   frame comes back once, good, re-encoding to exactly the bytes sent;
 * - after "0x00 + a known frame" the known frame is the last one handed up, intact
 *   (resynchronisation);
 * - an overfilled ring drops and counts exactly the bytes that did not fit.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "tl_frame.h"

#define MAX_INPUT 2048u

static unsigned long long rng = 0x9E3779B97F4A7C15ull;
static unsigned long failures = 0, inputs_done = 0;

static unsigned long long next_rand(void)
{
    /* xorshift64* (Vigna 2016) */
    rng ^= rng >> 12;
    rng ^= rng << 25;
    rng ^= rng >> 27;
    return rng * 2685821657736338717ull;
}

static size_t below(size_t n)
{
    return n == 0u ? 0u : (size_t)(next_rand() % n);
}

static void fail(const char *what, unsigned long detail)
{
    failures++;
    if (failures <= 10u)
        fprintf(stderr, "fuzz: input %lu: %s (%lu)\n", inputs_done, what, detail);
}

/* A random message that decodes: random payload bytes (half of them small, so that counts and
 * texts are often in range) filtered through the decoder. */
static void random_message(tl_message *m)
{
    uint8_t payload[TL_MAX_PAYLOAD];
    int tries;
    for (tries = 0; tries < 200; tries++) {
        const tl_msg_info *info = &tl_msg_table[below(TL_MSG_COUNT)];
        size_t n = info->min_payload + below(TL_MAX_PAYLOAD - info->min_payload + 1u), k;
        if (below(2u))
            n = info->min_payload + below(40u);
        if (n > TL_MAX_PAYLOAD)
            n = TL_MAX_PAYLOAD;
        for (k = 0; k < n; k++)
            payload[k] = (uint8_t)(below(2u) ? below(16u) : below(256u));
        if (tl_decode_payload(info->type_id, payload, n, m) == TL_OK)
            return;
    }
    memset(m, 0, sizeof *m);
    m->type_id = TL_MSG_KEEPALIVE;
    m->body.keepalive.host_time_ms = (uint32_t)next_rand();
}

static size_t random_frame(uint8_t *out, size_t cap, tl_message *m)
{
    int n;
    do {
        random_message(m);
        n = tl_encode_message(m, (uint16_t)below(65536u), (uint8_t)below(256u), out, cap);
    } while (n < 0); /* a payload over 240 bytes: draw again */
    return (size_t)n;
}

static size_t mutate(uint8_t *buf, size_t n, size_t cap)
{
    size_t k, rounds = 1u + below(4u), i;
    for (k = 0; k < rounds && n > 0u; k++) {
        i = below(n);
        switch (below(7u)) {
        case 0: buf[i] ^= (uint8_t)(1u << below(8u)); break;
        case 1: buf[i] = (uint8_t)below(256u); break;
        case 2: n = i; break;
        case 3: memmove(buf + i, buf + i + 1u, n - i - 1u); n--; break;
        case 4:
        case 5:
            if (n < cap) {
                memmove(buf + i + 1u, buf + i, n - i);
                buf[i] = (uint8_t)(below(6u) == 5u ? below(256u) : 0u);
                n++;
            }
            break;
        default: {
            size_t len = 1u + below(n - i);
            if (n + len <= cap) {
                memmove(buf + i + len, buf + i, n - i);
                n += len;
            }
        }
        }
    }
    return n;
}

static size_t garbage(uint8_t *buf, size_t cap)
{
    static const unsigned zero_odds[] = {0u, 256u, 16u, 3u};
    unsigned odds = zero_odds[below(4u)];
    size_t n = below(cap < 700u ? cap : 700u), k;
    for (k = 0; k < n; k++)
        buf[k] = (odds != 0u && below(odds) == 0u) ? 0u : (uint8_t)(1u + below(255u));
    return n;
}

/* Independent model of SPEC section 6's piece splitting: how many pieces complete (non-empty,
 * not discarded) and how many oversize runs start. */
typedef struct {
    size_t len;
    int discarding;
    unsigned long pieces, oversize;
} model;

static void model_byte(model *md, uint8_t b)
{
    if (b == 0u) {
        if (md->discarding)
            md->discarding = 0;
        else if (md->len > 0u)
            md->pieces++;
        md->len = 0;
    } else if (!md->discarding) {
        if (md->len == TL_MAX_ENCODED) {
            md->len = 0;
            md->discarding = 1;
            md->oversize++;
        } else {
            md->len++;
        }
    }
}

static unsigned long pieces_counted(const tl_decoder_stats *s)
{
    return (unsigned long)s->good + s->bad_crc + s->bad_cobs + s->too_short + s->malformed +
           s->unknown_type;
}

typedef struct {
    unsigned long handed_up, good, last_good_ok, expected_seen;
    const uint8_t *expect; /* an unmutated frame that must come back, or NULL */
    size_t expect_len;
    uint8_t last[TL_MAX_WIRE];
    size_t last_len;
    int last_kind;
} observed;

static void check_frame(const tl_frame *f, observed *ob)
{
    uint8_t again[TL_MAX_WIRE];
    int n;
    ob->handed_up++;
    ob->last_kind = f->kind;
    ob->last_len = 0;
    if (f->kind != TL_FRAME_GOOD)
        return;
    ob->good++;
    n = tl_encode_payload(&f->msg, again, sizeof again);
    if (n < 0 || (size_t)n > f->payload_len || memcmp(again, f->payload, (size_t)n) != 0) {
        fail("a good frame does not re-encode to its payload", (unsigned long)f->type_id);
        return;
    }
    n = tl_encode_message(&f->msg, f->seq, f->flags, again, sizeof again);
    if (n > 0) {
        memcpy(ob->last, again, (size_t)n);
        ob->last_len = (size_t)n;
    }
    if (ob->expect != NULL && f->version == TL_VERSION_BYTE && n > 0 &&
        (size_t)n == ob->expect_len && memcmp(again, ob->expect, (size_t)n) == 0)
        ob->expected_seen++;
}

/* Feed n bytes through the ring (random chunks) or byte by byte; keep the model in step. */
static void feed(tl_ring *ring, tl_decoder *d, tl_frame *f, const uint8_t *p, size_t n,
                 model *md, observed *ob)
{
    size_t i = 0;
    if (below(3u) == 0u) {
        for (i = 0; i < n; i++) {
            model_byte(md, p[i]);
            if (tl_decoder_push(d, p[i], f))
                check_frame(f, ob);
            if (d->len > TL_MAX_ENCODED)
                fail("decoder buffer length above its size", d->len);
        }
        return;
    }
    while (i < n) {
        size_t chunk = 1u + below(300u), room = TL_RING_SIZE - tl_ring_count(ring), k;
        if (chunk > n - i)
            chunk = n - i;
        if (chunk > room)
            chunk = room;
        for (k = 0; k < chunk; k++) {
            model_byte(md, p[i + k]);
            if (!tl_ring_push(ring, p[i + k]))
                fail("ring refused a byte it had room for", (unsigned long)k);
        }
        i += chunk;
        while (tl_rx_poll(ring, d, f))
            check_frame(f, ob);
        if (d->len > TL_MAX_ENCODED)
            fail("decoder buffer length above its size", d->len);
    }
}

static void overfill(tl_ring *ring, tl_decoder *d, tl_frame *f, model *md, observed *ob)
{
    uint32_t before = ring->dropped;
    size_t extra = 1u + below(100u), k, stored = 0;
    uint8_t b;
    while (tl_rx_poll(ring, d, f))
        check_frame(f, ob);
    for (k = 0; k < TL_RING_SIZE + extra; k++) {
        b = (uint8_t)below(256u);
        if (tl_ring_push(ring, b)) {
            model_byte(md, b);
            stored++;
        }
    }
    if (stored != TL_RING_SIZE || ring->dropped - before != extra)
        fail("overfilled ring: wrong count of stored or dropped bytes", (unsigned long)stored);
    while (tl_rx_poll(ring, d, f))
        check_frame(f, ob);
    if (tl_ring_count(ring) != 0u)
        fail("ring not empty after polling", (unsigned long)tl_ring_count(ring));
}

int main(int argc, char **argv)
{
    unsigned long n_inputs = argc > 1 ? strtoul(argv[1], NULL, 10) : 10000ul;
    unsigned long long bytes_total = 0;
    uint8_t *buf = malloc(MAX_INPUT), sentinel[TL_MAX_WIRE];
    tl_ring *ring = malloc(sizeof *ring);
    tl_decoder *d = malloc(sizeof *d);
    tl_frame *f = malloc(sizeof *f);
    tl_message sent, keep;
    size_t sentinel_len;
    model md;
    unsigned long handed_total = 0, good_total = 0;
    unsigned long tot[6] = {0, 0, 0, 0, 0, 0};
    if (argc > 2)
        rng ^= strtoull(argv[2], NULL, 10) * 0xD1B54A32D192ED03ull;
    if (buf == NULL || ring == NULL || d == NULL || f == NULL)
        return 2;
    memset(&keep, 0, sizeof keep);
    keep.type_id = TL_MSG_KEEPALIVE;
    keep.body.keepalive.host_time_ms = 0xABCDEFu;
    sentinel_len = (size_t)tl_encode_message(&keep, 0x1234u, 0u, sentinel, sizeof sentinel);
    tl_ring_init(ring);
    tl_decoder_init(d);
    memset(&md, 0, sizeof md);

    for (inputs_done = 0; inputs_done < n_inputs; inputs_done++) {
        observed ob;
        tl_decoder_stats before;
        unsigned long pieces_before, oversize_before, kind = below(100u);
        size_t n = 0, k;
        memset(&ob, 0, sizeof ob);
        if (below(16u) == 0u) { /* sometimes a fresh decoder, usually one that carries state */
            tl_decoder_init(d);
            memset(&md, 0, sizeof md);
        }
        before = d->stats;
        pieces_before = md.pieces;
        oversize_before = md.oversize;
        if (kind < 25u) {
            n = garbage(buf, MAX_INPUT);
        } else if (kind < 65u) {
            n = random_frame(buf, MAX_INPUT, &sent);
            if (below(4u) == 0u) {
                ob.expect = buf; /* unmutated: must come back exactly */
                ob.expect_len = n;
                if (md.len > 0u || md.discarding) { /* start it on a clean piece */
                    feed(ring, d, f, (const uint8_t *)"\0", 1u, &md, &ob);
                    before = d->stats;
                    pieces_before = md.pieces;
                    oversize_before = md.oversize;
                    ob.handed_up = ob.good = 0;
                }
            } else {
                n = mutate(buf, n, MAX_INPUT);
            }
        } else if (kind < 80u) {
            size_t parts = 2u + below(4u);
            for (k = 0; k < parts && n + 2u * TL_MAX_WIRE < MAX_INPUT; k++) {
                n += random_frame(buf + n, MAX_INPUT - n, &sent);
                if (below(2u))
                    n += garbage(buf + n, TL_MAX_WIRE) % 40u;
            }
            n = mutate(buf, n, MAX_INPUT);
        } else if (kind < 90u) {
            n = TL_MAX_ENCODED + below(800u);
            for (k = 0; k < n; k++)
                buf[k] = (uint8_t)(1u + below(255u));
            if (below(2u))
                buf[n++] = 0u;
        } else if (kind < 97u) {
            uint8_t payload[TL_MAX_PAYLOAD];
            size_t plen = below(TL_MAX_PAYLOAD + 1u);
            int rc;
            for (k = 0; k < plen; k++)
                payload[k] = (uint8_t)below(256u);
            rc = tl_frame_encode((uint8_t)(below(2u) ? TL_VERSION_BYTE : below(256u)),
                                 (uint8_t)below(256u), (uint16_t)below(65536u),
                                 (uint8_t)below(256u), payload, plen, buf, MAX_INPUT);
            if (rc < 0)
                fail("tl_frame_encode refused a payload within the limit", (unsigned long)plen);
            n = rc < 0 ? 0u : (size_t)rc;
        } else {
            overfill(ring, d, f, &md, &ob);
        }
        bytes_total += n;
        feed(ring, d, f, buf, n, &md, &ob);
        if (ob.expect != NULL && (ob.expected_seen != 1u || ob.handed_up != 1u))
            fail("an intact frame did not come back exactly once", ob.handed_up);
        /* resynchronisation: a zero, then a known frame, which must be the last one out */
        feed(ring, d, f, (const uint8_t *)"\0", 1u, &md, &ob);
        feed(ring, d, f, sentinel, sentinel_len, &md, &ob);
        bytes_total += 1u + sentinel_len;
        if (ob.last_kind != TL_FRAME_GOOD || ob.last_len != sentinel_len ||
            memcmp(ob.last, sentinel, sentinel_len) != 0)
            fail("the frame after a zero was not received intact", ob.handed_up);
        if (pieces_counted(&d->stats) - pieces_counted(&before) != md.pieces - pieces_before)
            fail("counters disagree with the number of completed pieces",
                 md.pieces - pieces_before);
        if (d->stats.oversize - before.oversize != md.oversize - oversize_before)
            fail("oversize counter disagrees with the model", md.oversize - oversize_before);
        if ((d->stats.good - before.good) + (d->stats.malformed - before.malformed) +
                (d->stats.unknown_type - before.unknown_type) != ob.handed_up ||
            d->stats.good - before.good != ob.good)
            fail("frames handed up disagree with the counters", ob.handed_up);
        if (d->len != md.len || (d->discarding != 0) != (md.discarding != 0))
            fail("decoder state disagrees with the model", d->len);
        tot[0] += d->stats.bad_crc - before.bad_crc;
        tot[1] += d->stats.bad_cobs - before.bad_cobs;
        tot[2] += d->stats.too_short - before.too_short;
        tot[3] += d->stats.oversize - before.oversize;
        tot[4] += d->stats.malformed - before.malformed;
        tot[5] += d->stats.unknown_type - before.unknown_type;
        handed_total += ob.handed_up;
        good_total += ob.good;
    }
    printf("fuzz inputs=%lu failures=%lu bytes=%llu frames=%lu good=%lu bad_crc=%lu "
           "bad_cobs=%lu short=%lu oversize=%lu malformed=%lu unknown_type=%lu dropped=%lu\n",
           inputs_done, failures, bytes_total, handed_total, good_total, tot[0], tot[1], tot[2],
           tot[3], tot[4], tot[5], (unsigned long)ring->dropped);
    free(buf);
    free(ring);
    free(d);
    free(f);
    return failures == 0u ? 0 : 1;
}
