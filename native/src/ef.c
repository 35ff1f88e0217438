/* Chunked Elias-Fano sequences (docs/FORMAT.md §7.18): checks on open, access by position,
 * search by value. The bit layout is nextword/succinct.py's.
 *
 * Reads use 64-bit little-endian loads at any byte offset before the stream's end bit O_C:
 * the 8 zero bytes after the stream (checked on open) keep every such load inside it. A
 * high region is shorter than 3·64 bits (⌊r/2^ℓ⌋ < 2m by the choice of ℓ), so selecting
 * the k-th set bit is at most four loads and popcounts. */
#include "ef.h"

#include <string.h>

#include "internal.h"

/* per-byte bit counts of x (SWAR): byte i holds popcount(byte i of x) */

#if defined(__GNUC__) || defined(__clang__)
#define CTZ(x) ((unsigned)__builtin_ctzll(x))
#define CLZ(x) ((unsigned)__builtin_clzll(x))
#else
static unsigned CTZ(uint64_t x) { unsigned c = 0; while (!(x & 1)) { x >>= 1; c++; } return c; }
static unsigned CLZ(uint64_t x) { unsigned c = 0; while (!(x >> 63)) { x <<= 1; c++; } return c; }
#endif


static inline uint64_t head_at(const nw_ef *e, uint64_t i) {
    const uint8_t *p = e->head + i * (uint64_t)e->hw;
    if (e->hw == 8) return nw_le64(p);
    return (uint64_t)p[0] | ((uint64_t)p[1] << 8) | ((uint64_t)p[2] << 16) | ((uint64_t)p[3] << 24);
}

uint64_t nw_ef_first(const nw_ef *e, uint64_t c) { return head_at(e, 2 * c); }

/* ℓ = ⌊log₂ ⌊r/m⌋⌋ when r ≥ m, else 0 (succinct._low_bits) */
static inline unsigned low_width(uint64_t r, uint64_t m) {
    uint64_t q = m == NW_EF_CHUNK ? r >> 6 : r / m; /* a full chunk: no division */
    return q ? 63u - CLZ(q) : 0u;
}

/* ℓ bits (1 ≤ ℓ ≤ 63) at bit p, least significant first; p + ℓ ≤ O_C */
static inline uint64_t read_bits(const uint8_t *bits, uint64_t p, unsigned l) {
    unsigned sh = (unsigned)(p & 7);
    uint64_t w = nw_le64(bits + (p >> 3)) >> sh;
    if (l + sh > 64) w |= (uint64_t)bits[(p >> 3) + 8] << (64 - sh);
    return w & ((1ull << l) - 1);
}

/* the bits [p, p + avail) of the region as one word, avail = min(64 − (p mod 8), he − p) */
static inline uint64_t region_word(const uint8_t *bits, uint64_t p, uint64_t he, uint64_t *avail) {
    unsigned sh = (unsigned)(p & 7);
    uint64_t w = nw_le64(bits + (p >> 3)) >> sh, a = 64 - sh;
    if (a > he - p) a = he - p;
    if (a < 64) w &= (1ull << a) - 1;
    *avail = a;
    return w;
}

/* position of the r-th set bit of w (r < popcount(w)): the byte that holds it from the
 * prefix sums of the byte counts, then at most 7 steps inside that byte */
static inline unsigned select64(uint64_t w, unsigned r) {
    uint64_t prefix = nw_byte_counts(w) * 0x0101010101010101ull; /* byte i: bits set in bytes 0 … i */
    unsigned base = 0;
    while (((prefix >> base) & 0xFF) <= r) base += 8;
    if (base) r -= (unsigned)((prefix >> (base - 8)) & 0xFF);
    uint64_t b = (w >> base) & 0xFF;
    for (; r; r--) b &= b - 1;
    return base + CTZ(b);
}

typedef struct chunk_view {
    uint64_t first, r, lo_at, hs, he;
    unsigned l;
    int m;
    int last; /* the sequence's last chunk */
} chunk_view;

/* chunk c's header, checked (§7.18 "Checks when a chunk is decoded": F_c ≤ F_{c+1}, at least m
 * apart in a strictly increasing sequence, O_c ≤ O_{c+1} ≤ O_C, the size its values need): then
 * every bit the readers touch lies in [O_c, O_{c+1}), inside the stream. -1 if not. */
static inline int view(const nw_ef *e, uint64_t c, chunk_view *v) {
    uint64_t m = e->n - c * NW_EF_CHUNK;
    if (m > NW_EF_CHUNK) m = NW_EF_CHUNK;
    uint64_t f0 = head_at(e, 2 * c), f1 = head_at(e, 2 * c + 2), o0 = head_at(e, 2 * c + 1), o1 = head_at(e, 2 * c + 3);
    if (f1 < f0 || (e->strict && f1 - f0 < m) || o1 < o0 || o1 > e->total) return -1;
    v->first = f0;
    v->r = f1 - f0;
    v->lo_at = o0;
    v->he = o1;
    v->m = (int)m;
    v->last = c + 1 == e->chunks;
    v->l = low_width(v->r, m);
    v->hs = o0 + m * v->l;
    if (m * v->l + (v->r >> v->l) + m != o1 - o0) return -1; /* < 64·63 + 3·64: ⌊r/2^ℓ⌋ < 2m */
    return 0;
}

/* first + (high·2^ℓ + low), refused above F_{c+1}; a chunk's first value must be F_c and the
 * sequence's last value F_C − 1 (§7.18, "Checks when a chunk is decoded") */
static inline int value_of(const nw_ef *e, const chunk_view *v, uint64_t high, int k, uint64_t *out) {
    if (high > (v->r >> v->l)) return -1;
    uint64_t d = high << v->l;
    if (v->l) d |= read_bits(e->bits, v->lo_at + (uint64_t)k * v->l, v->l);
    if (d > v->r || (k == 0 && d != 0) || (v->last && k == v->m - 1 && d + 1 != v->r)) return -1;
    *out = v->first + d;
    return 0;
}

int nw_ef_get(const nw_ef *e, uint64_t j, uint64_t *out) {
    if (j >= e->n) return -1;
    chunk_view v;
    if (view(e, j / NW_EF_CHUNK, &v)) return -1;
    int k = (int)(j % NW_EF_CHUNK);
    unsigned left = (unsigned)k;
    for (uint64_t p = v.hs; p < v.he;) {
        uint64_t avail, w = region_word(e->bits, p, v.he, &avail);
        unsigned pc = nw_popcount64(w);
        if (left < pc) {
            uint64_t at = p + select64(w, left) - v.hs; /* offset of the k-th set bit in the region */
            return value_of(e, &v, at - (uint64_t)k, k, out);
        }
        left -= pc;
        p += avail;
    }
    return -1; /* fewer than k+1 set bits: damaged */
}

int nw_ef_chunk(const nw_ef *e, uint64_t c, uint64_t vals[NW_EF_CHUNK], int *m) {
    if (c >= e->chunks) return -1;
    chunk_view v;
    if (view(e, c, &v)) return -1;
    int k = 0;
    for (uint64_t p = v.hs; p < v.he;) {
        uint64_t avail, w = region_word(e->bits, p, v.he, &avail);
        while (w) {
            if (k == v.m) return -1; /* more set bits than values */
            uint64_t at = p + CTZ(w) - v.hs;
            w &= w - 1;
            if (value_of(e, &v, at - (uint64_t)k, k, &vals[k])) return -1;
            /* in order: strictly so in a strictly increasing sequence (a whole chunk is at hand here) */
            if (k && (e->strict ? vals[k] <= vals[k - 1] : vals[k] < vals[k - 1])) return -1;
            k++;
        }
        p += avail;
    }
    if (k != v.m) return -1;
    *m = k;
    return 0;
}

/* The first k of chunk v with Y ≥ y (m if none) and its value, without decoding the chunk:
 * the values with a high part below hy = ⌊(y − F_c)/2^ℓ⌋ are the set bits before the hy-th
 * zero of the high region (a select of zeros), so only the values whose high part is hy
 * (and the next one) are read. */
static int chunk_lower(const nw_ef *e, const chunk_view *v, uint64_t y, int *k_out, uint64_t *val) {
    uint64_t d = y > v->first ? y - v->first : 0;
    *k_out = v->m;
    if (d > v->r) return 0; /* every value is ≤ F_{c+1} < y */
    uint64_t hy = d >> v->l, p = v->hs;
    if (hy) { /* just after the (hy−1)-th zero */
        uint64_t left = hy - 1;
        for (;;) {
            if (p >= v->he) return -1;
            uint64_t avail, w = region_word(e->bits, p, v->he, &avail);
            uint64_t z = ~w & (avail < 64 ? (1ull << avail) - 1 : ~0ull);
            unsigned zc = nw_popcount64(z);
            if (left < zc) {
                p += select64(z, (unsigned)left) + 1;
                break;
            }
            left -= zc;
            p += avail;
        }
    }
    uint64_t k = (p - v->hs) - hy; /* set bits before p */
    while (p < v->he && k < (uint64_t)v->m) {
        uint64_t avail, w = region_word(e->bits, p, v->he, &avail);
        while (w && k < (uint64_t)v->m) {
            uint64_t pos = p + CTZ(w) - v->hs;
            w &= w - 1;
            uint64_t x;
            if (value_of(e, v, pos - k, (int)k, &x)) return -1;
            if (x >= y) {
                *k_out = (int)k;
                *val = x;
                return 0;
            }
            k++;
        }
        p += avail;
    }
    return 0;
}

int nw_ef_lower(const nw_ef *e, uint64_t y, uint64_t s, uint64_t end, uint64_t *at, uint64_t *val) {
    if (end > e->n) return -1;
    if (s >= end) { *at = s; return 0; }
    uint64_t c0 = s / NW_EF_CHUNK, c1 = (end - 1) / NW_EF_CHUNK;
    /* the last chunk in [c0, c1] whose first value is < y holds the answer or ends before it */
    uint64_t lo = c0, hi = c1 + 1;
    while (lo < hi) {
        uint64_t mid = lo + (hi - lo) / 2;
        if (head_at(e, 2 * mid) < y) lo = mid + 1; else hi = mid;
    }
    if (lo == c0) { /* every chunk of the range starts at ≥ y: the answer is s */
        *at = s;
        return nw_ef_get(e, s, val);
    }
    uint64_t c = lo - 1, base = c * NW_EF_CHUNK;
    chunk_view v;
    if (view(e, c, &v)) return -1;
    int kk;
    uint64_t kv = 0;
    if (chunk_lower(e, &v, y, &kk, &kv)) return -1;
    /* the chunk is sorted: the answer within [a, b) of it is kk moved into that range */
    uint64_t a = s > base ? s - base : 0, b = end - base < (uint64_t)v.m ? end - base : (uint64_t)v.m;
    uint64_t r = (uint64_t)kk < a ? a : (uint64_t)kk > b ? b : (uint64_t)kk;
    *at = base + r;
    if (*at < end) {
        if (r == (uint64_t)kk && kk < v.m) *val = kv;
        else if (nw_ef_get(e, *at, val)) return -1; /* position a of the range, or the next chunk's first value */
    }
    return 0;
}

nw_status nw_ef_open(nw_ef *e, const char *label, const uint8_t *head, uint64_t head_n, int hw, const uint8_t *stream,
                     uint64_t stream_len, uint64_t n, int strict, int chunks, nw_error *err) {
    memset(e, 0, sizeof *e);
    if (hw != 4 && hw != 8) return nw_fail(err, NW_E_FORMAT, "%s header is neither u32 nor u64", label);
    uint64_t c = n / NW_EF_CHUNK + (n % NW_EF_CHUNK != 0);
    if (head_n != 2 * (c + 1))
        return nw_fail(err, NW_E_FORMAT, "%s has %llu header entries, expected %llu for %llu values", label,
                       (unsigned long long)head_n, (unsigned long long)(2 * (c + 1)), (unsigned long long)n);
    e->head = head;
    e->hw = hw;
    e->bits = stream;
    e->n = n;
    e->chunks = c;
    e->strict = strict;
    if (head_at(e, 1) != 0) return nw_fail(err, NW_E_FORMAT, "%s chunk offsets do not start at 0 and increase", label);
    uint64_t total = e->total = head_at(e, 2 * c + 1);
    uint64_t want = (total >> 3) + ((total & 7) != 0) + NW_EF_PAD;
    if (stream_len != want)
        return nw_fail(err, NW_E_FORMAT, "%s stream has %llu bytes, expected %llu", label, (unsigned long long)stream_len,
                       (unsigned long long)want);
    if (n == 0 && head_at(e, 0) != 0) return nw_fail(err, NW_E_FORMAT, "%s is empty but ends at %llu", label,
                                                     (unsigned long long)head_at(e, 0));
    for (uint64_t i = 0; chunks && i < c; i++) {
        uint64_t f0 = head_at(e, 2 * i), f1 = head_at(e, 2 * i + 2), o0 = head_at(e, 2 * i + 1), o1 = head_at(e, 2 * i + 3);
        uint64_t m = n - i * NW_EF_CHUNK;
        if (m > NW_EF_CHUNK) m = NW_EF_CHUNK;
        if (o1 < o0) return nw_fail(err, NW_E_FORMAT, "%s chunk offsets do not start at 0 and increase", label);
        if (f1 < f0 || (strict && f1 - f0 < m))
            return nw_fail(err, NW_E_FORMAT, "%s chunk first values are not increasing", label);
        uint64_t r = f1 - f0;
        unsigned l = low_width(r, m);
        uint64_t size = m * l + (r >> l) + m; /* < 64·63 + 3·64: ⌊r/2^ℓ⌋ < 2m */
        if (size != o1 - o0)
            return nw_fail(err, NW_E_FORMAT, "%s chunk %llu has %llu bits, its values need %llu", label, (unsigned long long)i,
                           (unsigned long long)(o1 - o0), (unsigned long long)size);
    }
    /* every bit from O_C on is zero (the last byte's unused bits and the padding) */
    uint64_t byte = total >> 3;
    if ((total & 7) && (stream[byte] >> (total & 7)))
        return nw_fail(err, NW_E_FORMAT, "%s stream has bits set past its end", label);
    for (uint64_t q = byte + ((total & 7) != 0); q < stream_len; q++)
        if (stream[q]) return nw_fail(err, NW_E_FORMAT, "%s stream padding is not zero", label);
    return NW_OK;
}
