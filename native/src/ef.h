/* Chunked Elias-Fano sequences of format 1.6 (docs/FORMAT.md §7.18; the reference coder
 * is nextword/succinct.py).
 *
 * A sequence of N non-decreasing values is a header of 2·(C+1) u32 or u64 entries (chunk
 * c's first value F_c and bit offset O_c, then a sentinel) and a bit stream. nw_ef_open
 * runs the checks that need only the headers; every reader below checks the header of the
 * chunk it reads (a few comparisons), so no read leaves the stream, whatever the file holds. Values inside a chunk are checked as they are decoded (each ≤ F_{c+1},
 * the first equal to F_c, the sequence's last equal to F_C − 1, the chunk's high region
 * holding its m values): a damaged chunk gives -1, never a read outside it. Nothing here
 * allocates.
 */
#ifndef NW_EF_H
#define NW_EF_H

#include <stdint.h>

#include "nextword.h"

/* values per chunk (nextword.succinct.CHUNK; fixed for version 1 of the layout) */
#define NW_EF_CHUNK 64
/* zero bytes after the stream's last byte (nextword.succinct.EF_PAD) */
#define NW_EF_PAD 8

typedef struct nw_ef {
    const uint8_t *head; /* 2·(C+1) little-endian entries of hw bytes */
    int hw;              /* 4 (u32) or 8 (u64) */
    const uint8_t *bits; /* the stream: ⌈O_C/8⌉ + NW_EF_PAD bytes */
    uint64_t n;          /* number of values */
    uint64_t chunks;     /* C */
    uint64_t total;      /* O_C: the stream's length in bits */
    int strict;          /* a strictly increasing sequence */
} nw_ef;

/* Check one sequence's header and stream (§7.18 "Checks on load") and fill *e.
 * `label` names it in messages (e.g. "SEFH/SEFB"); strict: a strictly increasing
 * sequence (every chunk spans at least its number of values); chunks: check every chunk's
 * header now (the vocabulary-sized sequences; O(chunks)) — either way each chunk's header
 * is checked again whenever it is read, so the readers stay inside the stream. NW_E_FORMAT
 * on failure. */
nw_status nw_ef_open(nw_ef *e, const char *label, const uint8_t *head, uint64_t head_n, int hw, const uint8_t *stream,
                     uint64_t stream_len, uint64_t n, int strict, int chunks, nw_error *err);

/* F_c, chunk c's first value (c ≤ C: F_C is the sentinel, last value + 1) */
uint64_t nw_ef_first(const nw_ef *e, uint64_t c);

/* Y_j (j < n) into *out; 0, or -1 if the chunk is damaged. */
int nw_ef_get(const nw_ef *e, uint64_t j, uint64_t *out);

/* The first j in [s, end) with Y_j ≥ y (end if none) into *at, and Y_j into *val when
 * j < end; 0, or -1 if a chunk read is damaged. end ≤ n. */
int nw_ef_lower(const nw_ef *e, uint64_t y, uint64_t s, uint64_t end, uint64_t *at, uint64_t *val);

/* Every value of chunk c into vals (m_c of them, returned in *m); 0, or -1 if damaged. */
int nw_ef_chunk(const nw_ef *e, uint64_t c, uint64_t vals[NW_EF_CHUNK], int *m);

#endif
