/* Internal declarations of the nextword native runtime (not part of the API). */
#ifndef NW_INTERNAL_H
#define NW_INTERNAL_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* trie.cpp: libmarisa behind a C interface */
void *nw_trie_map(const void *ptr, size_t len, size_t *n_keys);
void nw_trie_free(void *trie);
void *nw_cursor_new(void);
void nw_cursor_free(void *cursor);
/* trie key id of `key`, -1 if absent, -2 on a library error */
long long nw_trie_lookup(const void *trie, void *cursor, const char *key, size_t len);
/* the key of trie key id `key_id` (valid until the cursor's next use); 0 on success */
int nw_trie_restore(const void *trie, void *cursor, size_t key_id, const char **key, size_t *len);

#ifdef __cplusplus
}
#endif

#ifndef __cplusplus
#include <string.h>

#include "ef.h"
#include "nextword.h"

/* 8 bytes as a little-endian word (ef.c's sequences, model.c's ones bitmaps) */
static inline uint64_t nw_le64(const uint8_t *p) {
    uint64_t x;
    memcpy(&x, p, 8);
#if defined(__BYTE_ORDER__) && __BYTE_ORDER__ == __ORDER_BIG_ENDIAN__
    x = __builtin_bswap64(x);
#endif
    return x;
}

/* per byte of x, its number of set bits (SWAR) */
static inline uint64_t nw_byte_counts(uint64_t x) {
    x = x - ((x >> 1) & 0x5555555555555555ull);
    x = (x & 0x3333333333333333ull) + ((x >> 2) & 0x3333333333333333ull);
    return (x + (x >> 4)) & 0x0F0F0F0F0F0F0F0Full;
}

/* set bits of a word: one instruction where the target has it, else SWAR (on x86-64 baseline the
   builtin would be a libgcc call) */
#if (defined(__GNUC__) || defined(__clang__)) && (defined(__POPCNT__) || defined(__aarch64__))
static inline unsigned nw_popcount64(uint64_t x) { return (unsigned)__builtin_popcountll(x); }
#else
static inline unsigned nw_popcount64(uint64_t x) { return (unsigned)((nw_byte_counts(x) * 0x0101010101010101ull) >> 56); }
#endif

/* One typed array inside the mapped file: n elements of w bytes (1, 2, 4), little-endian. */
typedef struct nw_arr {
    const uint8_t *p;
    uint64_t n;
    int w;
} nw_arr;

static inline uint32_t nw_at(const nw_arr *a, uint64_t i) {
    const uint8_t *q = a->p + i * (uint64_t)a->w;
    switch (a->w) {
    case 1: return q[0];
    case 2: return (uint32_t)q[0] | ((uint32_t)q[1] << 8);
    default: return (uint32_t)q[0] | ((uint32_t)q[1] << 8) | ((uint32_t)q[2] << 16) | ((uint32_t)q[3] << 24);
    }
}

/* first index in [lo, hi) with a[i] >= x (a sorted there; any order terminates) */
static inline uint64_t nw_lower(const nw_arr *a, uint64_t lo, uint64_t hi, uint32_t x) {
    while (lo < hi) {
        uint64_t mid = lo + (hi - lo) / 2;
        if (nw_at(a, mid) < x) lo = mid + 1; else hi = mid;
    }
    return lo;
}

/* The values of one n-gram level as its codec stores them (the one dispatch point). */
typedef struct nw_level_values {
    nw_arr small, esc_i, esc_v;  /* quant (§7.17): the code stream, the codebook, empty */
    const char *tags;  /* e.g. "CNTS/BIGI/BIGC", for messages */
    uint64_t count;    /* the level's number of values */
    int bits;          /* quant: the code width q (2 .. 8) */
    uint64_t codes;    /* quant version 2: how many values have a code (set by its check) */
} nw_level_values;

struct nw_model;
typedef struct nw_codec {
    const char *name;
    int version;
    /* load-time checks of one level holding `n` values (lengths, escape table) */
    int (*check)(const struct nw_model *m, nw_level_values *lv, uint64_t n, nw_error *err);
    /* value of n-gram i; 0 on success, -1 if the data is damaged */
    int (*value)(const nw_level_values *lv, uint64_t i, uint64_t *out);
    /* values of n-grams s … e−1 (e − s ≤ NW_RUN_MAX) into out: a run read in one pass; 0, or -1 */
    int (*run)(const nw_level_values *lv, uint64_t s, uint64_t e, uint64_t *out);
} nw_codec;
#define NW_RUN_MAX 64

extern const nw_codec nw_codec_exact;

#define NW_LEVELS_MAX 8

struct nw_model {
    uint8_t *map;
    size_t map_len;
    char path[256];
    uint16_t major, minor;
    uint32_t n;           /* vocabulary size */
    uint64_t b, total, t, tctx;
    int kn, order;
    double lam, lam3;     /* stored, clamped to 0.999 */
    int n_bounds;         /* λ buckets (format 1.1): bounds and one more λ */
    uint64_t bounds[64];
    double lambdas[65];
    double d[3][3];       /* Kneser-Ney discounts per order */
    uint32_t sky_k;
    uint64_t sky_min, tsky_min, max_key;
    const nw_codec *codec;
    int quant_bits;       /* META codec "bits" (format 1.5), else 0 */
    int jm_path;          /* answered as Model's JM bigram path (λ by history count applies) */
    nw_arr TKID, IDTK, ALPH, APOS, KEY4, TOPK, UNIG, ROWS, SUCC, SEGS, SEGE, SKYP, SKYI, SKYC, DISI, DISO;
    nw_arr HIST, HN13, HDRI, HDRV, TCTB, TSUC, TLNI, TLNV, TDRI, TDRV, TSGS, TSGE, TSKP, TSKI, TSKC;
    nw_level_values v2, v3, tlen;
    /* format 1.6 (§7.18): the n-gram-sized lists stay chunked Elias-Fano sequences, read in
     * place; the vocabulary-sized ones (ROWS, UNIG, HIST, HN13, HDRI/HDRV) and the inverse
     * permutations IDTK, APOS are arrays made on open in `lists` (one allocation) */
    int ef;
    nw_ef sef, tpt, tef, tdi, tdv; /* v·(n+2) + SUCC; trigram starts; remapped trigram successors; TDRI; Σ TDRV */
    uint64_t d2, d3;               /* META dropped_contexts */
    uint8_t *lists;
    const uint8_t *disb;
    uint64_t disb_len;
    int has_hist;
    void *trie;
    int n_levels;
    uint64_t level_off[NW_LEVELS_MAX]; /* first entry of each TOPK level */
    uint64_t level_nb[NW_LEVELS_MAX];
    double *floor;        /* P1 of ids 0 .. n+1 */
    int text_rules;       /* META text_rules (absent: 1) */
    struct nw_mix *mix;   /* a mixture file (mix.c): then only path and mix are set */
};

nw_status nw_fail(nw_error *err, nw_status code, const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 3, 4)))
#endif
    ;

uint32_t nw_crc32(const uint8_t *p, size_t n);

/* c(v) as a history: HIST if stored, else derived from UNIG (§7.6) */
static inline uint64_t nw_hist(const struct nw_model *m, uint32_t v) {
    if (m->has_hist) return nw_at(&m->HIST, v);
    if (v == m->n) return 0;
    if (v == m->n + 2) return nw_at(&m->UNIG, m->n);
    return nw_at(&m->UNIG, v);
}

/* text.c */
size_t nw_utf8_encode(uint32_t cp, uint8_t out[4]);
/* decode one code point of valid-or-not UTF-8; returns bytes used, 0 if invalid */
size_t nw_utf8_decode(const uint8_t *p, size_t n, uint32_t *cp);
int nw_is_lower(uint32_t cp);
int nw_is_upper(uint32_t cp);
int nw_is_title(uint32_t cp);
#endif /* !__cplusplus */
#endif
