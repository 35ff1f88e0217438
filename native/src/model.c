/* Opening a model file: mmap and every load-time check of docs/FORMAT.md §8, in the order
 * of the Python reader (nextword/store.py: _parse, _check_meta, _check_model_kind,
 * _check_arrays, _check_ngram_arrays, _check_escaped_counts; nextword/model.py: the
 * floor check). Everything the queries later index with is validated here or bounded
 * where a query reads it (query.c). */
#define _POSIX_C_SOURCE 200809L
#include <errno.h>
#include <fcntl.h>
#include <pthread.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/mman.h>
#include <sys/stat.h>
#include <unistd.h>

#include "ef.h"
#include "internal.h"
#include "meta.h"
#include "query.h"

#define MAX_LAMBDA 0.999 /* estimators.jm.MAX_LAMBDA */
#define TOPK_FANOUT 64
#define CTX_BLOCK 16
#define SUMMARY_MIN 32
#define ESCAPE 255

static const uint8_t MAGIC[8] = {0x89, 'N', 'W', 'M', '\r', '\n', 0x1a, '\n'};

nw_status nw_fail(nw_error *err, nw_status code, const char *fmt, ...) {
    if (err) {
        va_list ap;
        va_start(ap, fmt);
        err->code = code;
        vsnprintf(err->message, sizeof err->message, fmt, ap);
        va_end(ap);
    }
    return code;
}

/* -- CRC-32 (zlib's), slicing by 8 ------------------------------------------------------- */

#ifdef NW_ZLIB
#include <zlib.h>
#else
static uint32_t crc_table[8][256];
static void crc_init(void) {
    for (uint32_t i = 0; i < 256; i++) {
        uint32_t c = i;
        for (int k = 0; k < 8; k++) c = c & 1 ? 0xEDB88320u ^ (c >> 1) : c >> 1;
        crc_table[0][i] = c;
    }
    for (uint32_t i = 0; i < 256; i++)
        for (int t = 1; t < 8; t++) crc_table[t][i] = (crc_table[t - 1][i] >> 8) ^ crc_table[0][crc_table[t - 1][i] & 0xff];
}
static void crc_once(void) {
    static pthread_once_t once = PTHREAD_ONCE_INIT;
    pthread_once(&once, crc_init);
}
#endif

uint32_t nw_crc32(const uint8_t *p, size_t n) {
#ifdef NW_ZLIB
    /* zlib's CRC-32 is the reference (§1) and about 20% faster than the tables above */
    uLong c = crc32(0L, Z_NULL, 0);
    while (n) {
        uInt part = n > 0x40000000u ? 0x40000000u : (uInt)n;
        c = crc32(c, p, part);
        p += part;
        n -= part;
    }
    return (uint32_t)c;
#else
    crc_once();
    uint32_t c = 0xFFFFFFFFu;
    while (n && ((uintptr_t)p & 7)) { c = crc_table[0][(c ^ *p++) & 0xff] ^ (c >> 8); n--; }
    while (n >= 8) {
        uint32_t a = c ^ ((uint32_t)p[0] | (uint32_t)p[1] << 8 | (uint32_t)p[2] << 16 | (uint32_t)p[3] << 24);
        c = crc_table[7][a & 0xff] ^ crc_table[6][(a >> 8) & 0xff] ^ crc_table[5][(a >> 16) & 0xff] ^
            crc_table[4][a >> 24] ^ crc_table[3][p[4]] ^ crc_table[2][p[5]] ^ crc_table[1][p[6]] ^ crc_table[0][p[7]];
        p += 8;
        n -= 8;
    }
    while (n--) c = crc_table[0][(c ^ *p++) & 0xff] ^ (c >> 8);
    return c ^ 0xFFFFFFFFu;
#endif
}

static uint64_t le(const uint8_t *p, int k) {
    uint64_t x = 0;
    for (int i = k - 1; i >= 0; i--) x = (x << 8) | p[i];
    return x;
}

/* -- sections -------------------------------------------------------------------------- */

typedef struct sec {
    char tag[5];
    int code;
    uint64_t off, len;
    uint32_t crc;
    int present;
} sec;

enum kind { K_RAW, K_ID, K_U1, K_U4, K_U24, K_U48 };
typedef struct spec {
    const char *tag;
    enum kind kind;
    int required;      /* one of the 22 sections of §7 */
    int crc_on_load;
} spec;

static const spec SPECS[] = {
    {"META", K_RAW, 1, 1}, {"TRIE", K_RAW, 1, 1}, {"TKID", K_ID, 1, 1}, {"IDTK", K_ID, 1, 1},
    {"ALPH", K_ID, 1, 1},  {"APOS", K_ID, 1, 1},  {"KEY4", K_U4, 1, 1}, {"TOPK", K_ID, 1, 1},
    {"UNIG", K_U4, 1, 1},  {"ROWS", K_U4, 1, 1},  {"SUCC", K_ID, 1, 0}, {"CNTS", K_U1, 1, 0},
    {"BIGI", K_U4, 1, 0},  {"BIGC", K_U4, 1, 0},  {"SEGS", K_U4, 1, 0}, {"SEGE", K_U4, 1, 0},
    {"SKYP", K_U4, 1, 0},  {"SKYI", K_U24, 1, 0}, {"SKYC", K_U24, 1, 0}, {"DISI", K_ID, 1, 1},
    {"DISO", K_U4, 1, 1},  {"DISB", K_RAW, 1, 1},
    /* optional (format 1.2 / 1.4) */
    {"HIST", K_U4, 0, 1},  {"HN13", K_U4, 0, 1},  {"HDRI", K_ID, 0, 1}, {"HDRV", K_U4, 0, 1},
    {"TCTB", K_U4, 0, 0},  {"TLEN", K_U1, 0, 0},  {"TLEI", K_U4, 0, 1}, {"TLEV", K_U4, 0, 1},
    {"TSUC", K_ID, 0, 0},  {"TVAL", K_U1, 0, 0},  {"TBGI", K_U4, 0, 1}, {"TBGC", K_U4, 0, 1},
    {"TLNI", K_U4, 0, 1},  {"TLNV", K_U4, 0, 1},  {"TDRI", K_U4, 0, 1}, {"TDRV", K_U4, 0, 1},
    {"TSGS", K_U4, 0, 0},  {"TSGE", K_U4, 0, 0},  {"TSKP", K_U4, 0, 0}, {"TSKI", K_U24, 0, 0},
    {"TSKC", K_U24, 0, 0},
    /* format 1.6 (§7.18): chunked Elias-Fano sequences (header u32 or u64, stream u8); in an
     * older file they are sections its kind does not have (refused). The vocabulary-sized ones
     * are checksummed on every load, the n-gram-sized ones with verify=True (as in Python). */
    {"RWEH", K_U48, 0, 1}, {"RWEB", K_U1, 0, 1},  {"SEFH", K_U48, 0, 0}, {"SEFB", K_U1, 0, 0},
    {"UNEH", K_U48, 0, 1}, {"UNEB", K_U1, 0, 1},  {"HSEH", K_U48, 0, 1}, {"HSEB", K_U1, 0, 1},
    {"N1EH", K_U48, 0, 1}, {"N1EB", K_U1, 0, 1},  {"N2EH", K_U48, 0, 1}, {"N2EB", K_U1, 0, 1},
    {"HDIH", K_U48, 0, 1}, {"HDIB", K_U1, 0, 1},  {"HDVH", K_U48, 0, 1}, {"HDVB", K_U1, 0, 1},
    {"TPTH", K_U48, 0, 0}, {"TPTB", K_U1, 0, 0},  {"TEFH", K_U48, 0, 0}, {"TEFB", K_U1, 0, 0},
    {"TDIH", K_U48, 0, 0}, {"TDIB", K_U1, 0, 0},  {"TDVH", K_U48, 0, 0}, {"TDVB", K_U1, 0, 0},
};
#define N_SPECS ((int)(sizeof SPECS / sizeof SPECS[0]))
#define N_REQUIRED 22
static const char *const TRIGRAM_TAGS[] = {"TCTB", "TLEN", "TLEI", "TLEV", "TSUC", "TVAL", "TBGI", "TBGC", "TLNI",
                                           "TLNV", "TDRI", "TDRV", "TSGS", "TSGE", "TSKP", "TSKI", "TSKC"};

/* the sections a 1.6 file replaces (§7.18), and those that replace them */
static const char *const REMOVED_16[] = {"IDTK", "APOS", "ROWS", "SUCC", "UNIG", "HIST", "HN13", "HDRI", "HDRV",
                                         "TCTB", "TLEN", "TLEI", "TLEV", "TSUC", "TDRI", "TDRV"};
/* the chunked Elias-Fano sequences of a 1.6 file (§7.18), by the first three letters of their tags */
enum { S_RWE, S_SEF, S_UNE, S_HSE, S_N1E, S_N2E, S_HDI, S_HDV, S_TPT, S_TEF, S_TDI, S_TDV, S_COUNT };
static const char *const SEQ_TAGS[S_COUNT] = {"RWE", "SEF", "UNE", "HSE", "N1E", "N2E", "HDI", "HDV", "TPT", "TEF", "TDI", "TDV"};
/* which sequences a 1.6 file of a kind has: every kind, KN only, order 3 only */
static int seq_wanted(int q, int kn, int order) {
    if (q == S_N1E || q == S_N2E) return kn;
    if (q >= S_TPT) return order == 3;
    return 1;
}
static int tag_in(const char *tag, const char *const *list, size_t n) {
    for (size_t j = 0; j < n; j++)
        if (!strcmp(tag, list[j])) return 1;
    return 0;
}
#define IN(tag, list) tag_in(tag, list, sizeof list / sizeof list[0])

static int spec_index(const char *tag) {
    for (int i = 0; i < N_SPECS; i++)
        if (memcmp(SPECS[i].tag, tag, 4) == 0) return i;
    return -1;
}

/* -- the exact codec (§7.12): one byte per value, 255 escapes to (index, value) tables -- */

static int exact_value(const nw_level_values *lv, uint64_t i, uint64_t *out) {
    if (i >= lv->small.n) return -1;
    uint32_t c = lv->small.p[i];
    if (c != ESCAPE) { *out = c; return 0; }
    uint64_t j = nw_lower(&lv->esc_i, 0, lv->esc_i.n, (uint32_t)i);
    if (j >= lv->esc_i.n || nw_at(&lv->esc_i, j) != i) return -1;
    *out = nw_at(&lv->esc_v, j);
    return 0;
}

static int exact_check(const struct nw_model *m, nw_level_values *lv, uint64_t n, nw_error *err) {
    (void)m;
    if (lv->small.n != n)
        return nw_fail(err, NW_E_FORMAT, "section %.4s holds %llu entries, expected %llu", lv->tags,
                       (unsigned long long)lv->small.n, (unsigned long long)n), -1;
    if (lv->esc_i.n != lv->esc_v.n)
        return nw_fail(err, NW_E_FORMAT, "sections %s differ in length", lv->tags + 5), -1;
    if (lv->esc_i.n) {
        uint32_t minv = 0xFFFFFFFFu;
        for (uint64_t j = 0; j < lv->esc_v.n; j++) if (nw_at(&lv->esc_v, j) < minv) minv = nw_at(&lv->esc_v, j);
        if (nw_at(&lv->esc_i, lv->esc_i.n - 1) >= n || minv < ESCAPE)
            return nw_fail(err, NW_E_FORMAT, "sections %s are inconsistent", lv->tags + 5), -1;
    }
    return 0;
}

/* a run through the codec's value() (the exact codec and quant version 1: one read each) */
static int run_by_value(int (*value)(const nw_level_values *, uint64_t, uint64_t *), const nw_level_values *lv, uint64_t s,
                        uint64_t e, uint64_t *out) {
    for (uint64_t i = s; i < e; i++)
        if (value(lv, i, &out[i - s])) return -1;
    return 0;
}
static int exact_run(const nw_level_values *lv, uint64_t s, uint64_t e, uint64_t *out) { return run_by_value(exact_value, lv, s, e, out); }

const nw_codec nw_codec_exact = {"exact", 1, exact_check, exact_value, exact_run};

/* -- the quant codec (§7.17): q-bit codes, one little-endian bit stream, into a codebook -- */

static int quant_value(const nw_level_values *lv, uint64_t i, uint64_t *out) {
    if (i >= lv->count) return -1;
    int q = lv->bits;
    uint64_t bit = i * (uint64_t)q, at = bit >> 3;
    unsigned sh = (unsigned)(bit & 7);
    uint32_t w = lv->small.p[at];
    if (sh + (unsigned)q > 8) w |= (uint32_t)lv->small.p[at + 1] << 8; /* in range: checked length */
    uint32_t code = (w >> sh) & ((1u << q) - 1u);
    if (code >= lv->esc_i.n) return -1; /* "value code ... past the codebook" */
    *out = nw_at(&lv->esc_i, code);
    return 0;
}

static int quant_check(const struct nw_model *m, nw_level_values *lv, uint64_t n, nw_error *err) {
    (void)m;
    int q = lv->bits;
    uint64_t want = (n * (uint64_t)q + 7) / 8, ncb = lv->esc_i.n, maxcb = 1ull << q;
    if (lv->small.n != want)
        return nw_fail(err, NW_E_FORMAT, "section %.4s holds %llu bytes, expected %llu for %llu %d-bit codes", lv->tags,
                       (unsigned long long)lv->small.n, (unsigned long long)want, (unsigned long long)n, q), -1;
    if (!(ncb >= 1 && ncb <= maxcb) && !(n == 0 && ncb == 0))
        return nw_fail(err, NW_E_FORMAT, "section %.4s holds %llu codebook entries, expected 1 to %llu", lv->tags + 5,
                       (unsigned long long)ncb, (unsigned long long)maxcb), -1;
    int ok = ncb == 0 || nw_at(&lv->esc_i, 0) >= 1;
    for (uint64_t j = 1; ok && j < ncb; j++) ok = nw_at(&lv->esc_i, j) > nw_at(&lv->esc_i, j - 1);
    if (!ok)
        return nw_fail(err, NW_E_FORMAT, "section %.4s is not a strictly increasing codebook of values >= 1", lv->tags + 5), -1;
    if (lv->esc_v.n)
        return nw_fail(err, NW_E_FORMAT, "section %.4s must be empty for codec 'quant'", lv->tags + 10), -1;
    unsigned tail = (unsigned)(n * (uint64_t)q % 8);
    if (tail && (lv->small.p[lv->small.n - 1] >> tail))
        return nw_fail(err, NW_E_FORMAT, "section %.4s has non-zero bits after the last code", lv->tags), -1;
    return 0;
}

static int quant_run(const nw_level_values *lv, uint64_t s, uint64_t e, uint64_t *out) { return run_by_value(quant_value, lv, s, e, out); }

static const nw_codec nw_codec_quant = {"quant", 1, quant_check, quant_value, quant_run};

/* -- the quant codec, version 2 (§7.18, 1.6 files only): a ones bitmap with a rank per 512
 *    n-grams, q-bit codes for the other values ------------------------------------------ */

#define ONES_BLOCK 512
#define BLOCK_BYTES (4 + ONES_BLOCK / 8)

static inline unsigned popcount8(unsigned x) {
    x = x - ((x >> 1) & 0x55u);
    x = (x & 0x33u) + ((x >> 2) & 0x33u);
    return (x + (x >> 4)) & 0x0Fu;
}

/* the set bits of block blk's bitmap before bit j (j < 512), plus the block's rank */
static inline uint64_t ones_before(const uint8_t *blk, unsigned j) {
    uint64_t ones = (uint64_t)blk[0] | ((uint64_t)blk[1] << 8) | ((uint64_t)blk[2] << 16) | ((uint64_t)blk[3] << 24);
    unsigned w = 0;
    for (; w < j / 64; w++) ones += nw_popcount64(nw_le64(blk + 4 + 8 * w));
    if (j % 64) ones += nw_popcount64(nw_le64(blk + 4 + 8 * w) & ((1ull << (j % 64)) - 1));
    return ones;
}

static int quant2_code(const nw_level_values *lv, uint64_t r, uint64_t *out);

/* small: the bitmap (68 bytes per block); esc_i: the codebook; esc_v: the codes (u32 words,
 * read as bytes); count: n-grams; codes: how many have a code (set on load) */
static int quant2_value(const nw_level_values *lv, uint64_t i, uint64_t *out) {
    if (i >= lv->count) return -1;
    const uint8_t *blk = lv->small.p + (i / ONES_BLOCK) * BLOCK_BYTES;
    unsigned j = (unsigned)(i % ONES_BLOCK);
    if ((blk[4 + j / 8] >> (j % 8)) & 1) { *out = 1; return 0; }
    uint64_t ones = ones_before(blk, j);
    if (ones > i || i - ones >= lv->codes) return -1; /* a rank past the value codes */
    return quant2_code(lv, i - ones, out);
}


static int quant2_check(const struct nw_model *m, nw_level_values *lv, uint64_t n, nw_error *err) {
    (void)m;
    int q = lv->bits;
    uint64_t blocks = (n + ONES_BLOCK - 1) / ONES_BLOCK, ncb = lv->esc_i.n, maxcb = 1ull << q;
    if (lv->small.n != blocks * BLOCK_BYTES)
        return nw_fail(err, NW_E_FORMAT, "section %.4s holds %llu bytes, expected %llu for %llu n-grams", lv->tags,
                       (unsigned long long)lv->small.n, (unsigned long long)(blocks * BLOCK_BYTES), (unsigned long long)n), -1;
    if (!(ncb >= 1 && ncb <= maxcb) && !(n == 0 && ncb == 0))
        return nw_fail(err, NW_E_FORMAT, "section %.4s holds %llu codebook entries, expected 1 to %llu", lv->tags + 5,
                       (unsigned long long)ncb, (unsigned long long)maxcb), -1;
    int ok = ncb == 0 || nw_at(&lv->esc_i, 0) >= 1;
    for (uint64_t j = 1; ok && j < ncb; j++) ok = nw_at(&lv->esc_i, j) > nw_at(&lv->esc_i, j - 1);
    if (!ok)
        return nw_fail(err, NW_E_FORMAT, "section %.4s is not a strictly increasing codebook of values >= 1", lv->tags + 5), -1;
    uint64_t ones = 0;
    if (blocks) {
        const uint8_t *last = lv->small.p + (blocks - 1) * BLOCK_BYTES, *first = lv->small.p;
        uint64_t used = n - (blocks - 1) * ONES_BLOCK; /* bits of the last block that belong to n-grams */
        for (uint64_t j = used; j < ONES_BLOCK; j++)
            if ((last[4 + j / 8] >> (j % 8)) & 1)
                return nw_fail(err, NW_E_FORMAT, "section %.4s has bits set after the last n-gram", lv->tags), -1;
        ones = (uint64_t)last[0] | ((uint64_t)last[1] << 8) | ((uint64_t)last[2] << 16) | ((uint64_t)last[3] << 24);
        for (unsigned b = 0; b < ONES_BLOCK / 8; b++) ones += popcount8(last[4 + b]);
        if ((first[0] | first[1] | first[2] | first[3]) != 0 || ones > n)
            return nw_fail(err, NW_E_FORMAT, "section %.4s has ranks that do not start at 0 or exceed the n-grams", lv->tags), -1;
    }
    uint64_t codes = n - ones, want = (codes * (uint64_t)q + 31) / 32;
    if (lv->esc_v.n != want)
        return nw_fail(err, NW_E_FORMAT, "section %.4s holds %llu words, expected %llu for %llu %d-bit codes", lv->tags + 10,
                       (unsigned long long)lv->esc_v.n, (unsigned long long)want, (unsigned long long)codes, q), -1;
    unsigned tail = (unsigned)(codes * (uint64_t)q % 32);
    if (tail && (nw_at(&lv->esc_v, lv->esc_v.n - 1) >> tail))
        return nw_fail(err, NW_E_FORMAT, "section %.4s has non-zero bits after the last code", lv->tags + 10), -1;
    lv->codes = codes;
    return 0;
}

/* code r of a version-2 level (r < codes: inside the checked code words) */
static int quant2_code(const nw_level_values *lv, uint64_t r, uint64_t *out) {
    int q = lv->bits;
    uint64_t bit = r * (uint64_t)q, at = bit >> 3;
    unsigned sh = (unsigned)(bit & 7);
    const uint8_t *cb = lv->esc_v.p;
    uint32_t w = cb[at];
    if (sh + (unsigned)q > 8) w |= (uint32_t)cb[at + 1] << 8;
    uint32_t code = (w >> sh) & ((1u << q) - 1u);
    if (code >= lv->esc_i.n) return -1;
    *out = nw_at(&lv->esc_i, code);
    return 0;
}

/* a run: the rank of its first n-gram once, then its bits and codes in order */
static int quant2_run(const nw_level_values *lv, uint64_t s, uint64_t e, uint64_t *out) {
    if (s >= e) return 0;
    if (e > lv->count) return -1;
    uint64_t r = 0; /* the code number of the next value that is not 1 */
    for (uint64_t i = s; i < e; i++) {
        const uint8_t *blk = lv->small.p + (i / ONES_BLOCK) * BLOCK_BYTES;
        unsigned j = (unsigned)(i % ONES_BLOCK);
        if (i == s || j == 0) { /* the run's first n-gram, or a new block: its rank */
            uint64_t ones = ones_before(blk, j);
            if (ones > i) return -1;
            r = i - ones;
        }
        if ((blk[4 + j / 8] >> (j % 8)) & 1) {
            out[i - s] = 1;
            continue;
        }
        if (r >= lv->codes || quant2_code(lv, r, &out[i - s])) return -1;
        r++;
    }
    return 0;
}

static const nw_codec nw_codec_quant2 = {"quant", 2, quant2_check, quant2_value, quant2_run};
/* every codec this library reads, and the format minor version each belongs to */
static const nw_codec *const CODECS[] = {&nw_codec_exact, &nw_codec_quant, &nw_codec_quant2};
#define EXACT_MINOR 4
#define QUANT_MINOR 5
#define EF_MINOR 6 /* compressed successor lists (§7.18), with either codec */

/* -- META (§7.1, §7.11) ----------------------------------------------------------------- */

enum { F_N_WORDS, F_LAMBDA, F_TOTAL, F_BIGRAMS, F_SKY_K, F_SKY_MIN, F_FANOUT, F_MAX_KEY, F_STATS, F_BUCKETS,
       F_ESTIMATOR, F_ORDER, F_CODEC, F_DISCOUNTS, F_NOTES, F_LAMBDA3, F_TRIGRAMS, F_TCTX, F_TSUMMIN, F_TSKYMIN, F_TEXT_RULES,
       F_SUCCESSORS, F_DROPPED, F_COUNT };
static const char *const FIELDS[F_COUNT] = {"n_words", "lambda", "total", "bigrams", "skyband_k", "skyband_min",
                                            "topk_fanout", "max_key_chars", "stats", "lambda_buckets", "estimator",
                                            "order", "codec", "discounts", "discount_notes", "lambda3", "trigrams",
                                            "trigram_contexts", "trigram_summary_min", "trigram_skyband_min", "text_rules",
                                            "successors", "dropped_contexts"};

typedef struct meta_view {
    const uint8_t *p;
    size_t n;
    size_t at[F_COUNT]; /* offset of the field's value, or SIZE_MAX */
} meta_view;

static int field(const meta_view *mv, int f, nw_mpv *v) {
    if (mv->at[f] == (size_t)-1) return 0;
    nw_mp m = {mv->p, mv->n, mv->at[f]};
    return nw_mp_read(&m, v) == 0 ? 1 : -1;
}

/* an int field in [lo, hi] (booleans refused; Python compares float(v)) */
static nw_status need_int(const meta_view *mv, int f, double lo, double hi, uint64_t *out, nw_error *err) {
    nw_mpv v;
    int r = field(mv, f, &v);
    if (r != 1 || !nw_mp_is_int(&v) || !(lo <= nw_mp_num(&v) && nw_mp_num(&v) <= hi))
        return nw_fail(err, NW_E_FORMAT, "metadata field '%s' is invalid", FIELDS[f]);
    *out = v.t == MP_POS ? v.u : 0;
    return NW_OK;
}
static nw_status need_num(const meta_view *mv, int f, double lo, double hi, double *out, nw_error *err) {
    nw_mpv v;
    int r = field(mv, f, &v);
    if (r != 1 || !(nw_mp_is_int(&v) || v.t == MP_FLOAT) || !(lo <= nw_mp_num(&v) && nw_mp_num(&v) <= hi))
        return nw_fail(err, NW_E_FORMAT, "metadata field '%s' is invalid", FIELDS[f]);
    *out = nw_mp_num(&v);
    return NW_OK;
}

static nw_status read_meta(nw_model *m, const uint8_t *p, size_t n, uint64_t size, meta_view *mv, nw_error *err) {
    nw_mp mp = {p, n, 0};
    nw_mpv top;
    for (int f = 0; f < F_COUNT; f++) mv->at[f] = (size_t)-1;
    mv->p = p;
    mv->n = n;
    if (nw_mp_read(&mp, &top)) return nw_fail(err, NW_E_FORMAT, "damaged model: metadata is not MessagePack");
    if (top.t != MP_MAP) return nw_fail(err, NW_E_FORMAT, "metadata is not a map");
    for (uint64_t j = 0; j < top.u; j++) {
        nw_mpv key;
        if (nw_mp_read(&mp, &key) || (key.t != MP_STR && key.t != MP_BIN))
            return nw_fail(err, NW_E_FORMAT, "damaged model: metadata key is not a string");
        size_t at = mp.i;
        if (nw_mp_skip(&mp, 1)) return nw_fail(err, NW_E_FORMAT, "damaged model: metadata is not MessagePack");
        if (key.t != MP_STR) continue;
        for (int f = 0; f < F_COUNT; f++)
            if (nw_mp_str_eq(&key, FIELDS[f])) mv->at[f] = at; /* a repeated key: the last wins */
    }
    if (mp.i != n) return nw_fail(err, NW_E_FORMAT, "damaged model: extra bytes after the metadata");
    uint64_t x;
    nw_status st;
    double hi_n = (double)(size < 0xFFFFFFF0u ? size : 0xFFFFFFF0u);
    if ((st = need_int(mv, F_N_WORDS, 1, hi_n, &x, err))) return st;
    m->n = (uint32_t)x;
    if ((st = need_num(mv, F_LAMBDA, 0.0, 1.0, &m->lam, err))) return st;
    if ((st = need_int(mv, F_TOTAL, 1, 9007199254740992.0, &m->total, err))) return st;
    if ((st = need_int(mv, F_BIGRAMS, 0, (double)size, &m->b, err))) return st;
    if ((st = need_int(mv, F_SKY_K, 1, 4096, &x, err))) return st;
    m->sky_k = (uint32_t)x;
    if ((st = need_int(mv, F_SKY_MIN, 0, 4294967296.0, &m->sky_min, err))) return st;
    if ((st = need_int(mv, F_MAX_KEY, 1, 1048576, &m->max_key, err))) return st;
    /* text_rules: absent means 1; a newer version than this library's rules is refused */
    m->text_rules = 1;
    if (mv->at[F_TEXT_RULES] != (size_t)-1) {
        nw_mpv tr;
        if (field(mv, F_TEXT_RULES, &tr) != 1 || tr.t != MP_POS || tr.u < 1)
            return nw_fail(err, NW_E_FORMAT, "metadata field 'text_rules' is invalid");
        if (tr.u > NW_TEXT_RULES)
            return nw_fail(err, NW_E_VERSION, "counted with text rules version %llu; this library has version %d",
                           (unsigned long long)tr.u, NW_TEXT_RULES);
        m->text_rules = (int)tr.u;
    }
    nw_mpv v;
    if (field(mv, F_FANOUT, &v) != 1 || nw_mp_num(&v) != 64.0 || !(nw_mp_is_int(&v) || v.t == MP_FLOAT))
        return nw_fail(err, NW_E_FORMAT, "metadata field 'topk_fanout' is invalid");
    if (field(mv, F_STATS, &v) == 1 && v.t != MP_MAP) return nw_fail(err, NW_E_FORMAT, "metadata field 'stats' is invalid");
    m->n_bounds = -1;
    if (field(mv, F_BUCKETS, &v) == 1 && v.t != MP_NIL) {
        /* {"bounds": [ints >= 1, increasing, <= 64], "lambdas": [len + 1 numbers in [0, 1]]} */
        int ok = v.t == MP_MAP, nb = -1, nl = -1;
        nw_mp q = {p, n, mv->at[F_BUCKETS]};
        nw_mpv tmp;
        nw_mp_read(&q, &tmp);
        size_t at_b = (size_t)-1, at_l = (size_t)-1;
        for (uint64_t j = 0; ok && j < v.u; j++) {
            nw_mpv key;
            nw_mp_read(&q, &key);
            size_t at = q.i;
            nw_mp_skip(&q, 1);
            if (nw_mp_str_eq(&key, "bounds")) at_b = at;
            else if (nw_mp_str_eq(&key, "lambdas")) at_l = at;
        }
        if (ok && at_b != (size_t)-1 && at_l != (size_t)-1) {
            nw_mp qb = {p, n, at_b}, ql = {p, n, at_l};
            nw_mpv ab, al;
            nw_mp_read(&qb, &ab);
            nw_mp_read(&ql, &al);
            ok = ab.t == MP_ARR && al.t == MP_ARR && al.u == ab.u + 1 && ab.u <= 64;
            if (ok) { nb = (int)ab.u; nl = (int)al.u; }
            for (int j = 0; ok && j < nb; j++) {
                nw_mpv e;
                nw_mp_read(&qb, &e);
                ok = e.t == MP_POS && e.u >= 1 && (j == 0 || e.u > m->bounds[j - 1]);
                m->bounds[j] = e.u;
            }
            for (int j = 0; ok && j < nl; j++) {
                nw_mpv e;
                nw_mp_read(&ql, &e);
                ok = (nw_mp_is_int(&e) || e.t == MP_FLOAT) && 0.0 <= nw_mp_num(&e) && nw_mp_num(&e) <= 1.0;
                m->lambdas[j] = nw_mp_num(&e);
            }
        } else ok = 0;
        if (!ok) return nw_fail(err, NW_E_FORMAT, "metadata field 'lambda_buckets' is invalid");
        m->n_bounds = nb;
    }
    return NW_OK;
}

/* META successors (§7.18): {"name": "ef", "version": 1} in a 1.6 file, absent elsewhere */
static nw_status read_successors(nw_model *m, const meta_view *mv, nw_error *err) {
    nw_mpv v;
    m->ef = m->minor == EF_MINOR;
    if (!m->ef) {
        if (mv->at[F_SUCCESSORS] != (size_t)-1)
            return nw_fail(err, NW_E_FORMAT, "format 1.%u files have no 'successors' field (their lists are plain arrays)", m->minor);
        return NW_OK;
    }
    if (field(mv, F_SUCCESSORS, &v) != 1 || v.t != MP_MAP)
        return nw_fail(err, NW_E_FORMAT, "metadata field 'successors' is invalid");
    nw_mp q = {mv->p, mv->n, mv->at[F_SUCCESSORS]};
    nw_mpv tmp, name = {0}, ver = {0};
    int have_name = 0, have_ver = 0;
    nw_mp_read(&q, &tmp);
    for (uint64_t j = 0; j < v.u; j++) {
        nw_mpv key, val;
        if (nw_mp_read(&q, &key)) return nw_fail(err, NW_E_FORMAT, "metadata field 'successors' is invalid");
        nw_mp r = {mv->p, mv->n, q.i};
        if (nw_mp_read(&r, &val) || nw_mp_skip(&q, 1)) return nw_fail(err, NW_E_FORMAT, "metadata field 'successors' is invalid");
        if (nw_mp_str_eq(&key, "name")) { name = val; have_name = 1; }
        else if (nw_mp_str_eq(&key, "version")) { ver = val; have_ver = 1; }
    }
    if (!have_name || name.t != MP_STR || !have_ver || ver.t != MP_POS)
        return nw_fail(err, NW_E_FORMAT, "metadata field 'successors' is invalid");
    if (!nw_mp_str_eq(&name, "ef") || ver.u != 1)
        return nw_fail(err, NW_E_UNSUPPORTED, "unknown successor list coding '%.*s' version %llu (this library reads 'ef' version 1)",
                       (int)(name.len > 40 ? 40 : name.len), (const char *)name.s, (unsigned long long)ver.u);
    return NW_OK;
}

/* format 1.4 fields and the optional sections each kind has (store._check_model_kind) */
static nw_status read_kind(nw_model *m, const meta_view *mv, nw_error *err) {
    nw_mpv v;
    nw_status st0 = read_successors(m, mv, err);
    if (st0) return st0;
    if (m->minor < 3) {
        int bad = 0;
        if (field(mv, F_ESTIMATOR, &v) == 1 && !nw_mp_str_eq(&v, "jm")) bad = 1;
        if (field(mv, F_ORDER, &v) == 1 && !(v.t != MP_BOOL && nw_mp_num(&v) == 2.0 && (nw_mp_is_int(&v) || v.t == MP_FLOAT))) bad = 1;
        if (mv->at[F_DISCOUNTS] != (size_t)-1 || mv->at[F_LAMBDA3] != (size_t)-1) bad = 1;
        if (bad) return nw_fail(err, NW_E_FORMAT, "format 1.%u files hold Jelinek-Mercer bigram models only", m->minor);
        if (mv->at[F_CODEC] != (size_t)-1)
            return nw_fail(err, NW_E_FORMAT, "format 1.%u files have no 'codec' field (their values are exact)", m->minor);
        m->kn = 0;
        m->order = 2;
        m->codec = &nw_codec_exact;
        return NW_OK;
    }
    /* the codec: the one dispatch point; an unknown name or version is refused by name */
    if (field(mv, F_CODEC, &v) != 1 || v.t != MP_MAP)
        return nw_fail(err, NW_E_FORMAT, "metadata field 'codec' is invalid");
    {
        nw_mp q = {mv->p, mv->n, mv->at[F_CODEC]};
        nw_mpv tmp, name = {0}, ver = {0}, bits = {0};
        int have_name = 0, have_ver = 0, have_bits = 0;
        nw_mp_read(&q, &tmp);
        for (uint64_t j = 0; j < v.u; j++) {
            nw_mpv key, val;
            nw_mp_read(&q, &key);
            size_t at = q.i;
            nw_mp r = {mv->p, mv->n, at};
            nw_mp_read(&r, &val);
            nw_mp_skip(&q, 1);
            if (nw_mp_str_eq(&key, "name")) { name = val; have_name = 1; }
            else if (nw_mp_str_eq(&key, "version")) { ver = val; have_ver = 1; }
            else if (nw_mp_str_eq(&key, "bits")) { bits = val; have_bits = 1; }
        }
        if (!have_name || name.t != MP_STR || !have_ver || ver.t != MP_POS)
            return nw_fail(err, NW_E_FORMAT, "metadata field 'codec' is invalid");
        m->codec = NULL;
        for (size_t c = 0; c < sizeof CODECS / sizeof CODECS[0]; c++)
            if (nw_mp_str_eq(&name, CODECS[c]->name) && ver.u == (uint64_t)CODECS[c]->version) m->codec = CODECS[c];
        if (m->codec == NULL)
            return nw_fail(err, NW_E_UNSUPPORTED,
                           "unknown value codec '%.*s' version %llu (this library reads 'exact' version 1 and 'quant' versions 1 and 2)",
                           (int)(name.len > 40 ? 40 : name.len), (const char *)name.s, (unsigned long long)ver.u);
        m->quant_bits = 0;
        int quant = m->codec == &nw_codec_quant || m->codec == &nw_codec_quant2;
        if (quant) { /* codecs.codec_named: bits an int in 2 .. 8, booleans refused */
            if (!have_bits)
                return nw_fail(err, NW_E_UNSUPPORTED, "codec 'quant' without bits (this library reads 2 to 8)");
            if (bits.t != MP_POS)
                return nw_fail(err, NW_E_UNSUPPORTED, "codec 'quant' with bits that are not a positive int (this library reads 2 to 8)");
            if (bits.u < 2 || bits.u > 8)
                return nw_fail(err, NW_E_UNSUPPORTED, "codec 'quant' with bits %llu (this library reads 2 to 8)",
                               (unsigned long long)bits.u);
            m->quant_bits = (int)bits.u;
        }
        /* a 1.4 file names 'exact', a 1.5 file 'quant', a 1.6 file either; 'quant' version 2 is
         * for 1.6 files only (store._check_model_kind) */
        if (m->codec == &nw_codec_quant2 && m->minor != EF_MINOR)
            return nw_fail(err, NW_E_VERSION, "codec 'quant' version 2 belongs to format 1.%d files, not 1.%u", EF_MINOR, m->minor);
        if (m->minor != EF_MINOR && quant != (m->minor == QUANT_MINOR))
            return nw_fail(err, NW_E_VERSION, "format 1.%u files do not use codec '%s' (1.%d: exact values, 1.%d: quantised)",
                           m->minor, m->codec->name, EXACT_MINOR, QUANT_MINOR);
    }
    if (field(mv, F_ESTIMATOR, &v) != 1 || !(nw_mp_str_eq(&v, "jm") || nw_mp_str_eq(&v, "kn")))
        return nw_fail(err, NW_E_FORMAT, "metadata field 'estimator' is invalid");
    m->kn = nw_mp_str_eq(&v, "kn");
    if (field(mv, F_ORDER, &v) != 1 || v.t != MP_POS || (v.u != 2 && v.u != 3))
        return nw_fail(err, NW_E_FORMAT, "metadata field 'order' is invalid");
    m->order = (int)v.u;
    if (!m->kn && m->order == 2 && m->minor != QUANT_MINOR && m->minor != EF_MINOR)
        return nw_fail(err, NW_E_FORMAT, "a Jelinek-Mercer bigram model is a format 1.0-1.2, 1.%d or 1.%d file, not 1.%u",
                       QUANT_MINOR, EF_MINOR, m->minor);
    if (m->kn) {
        int ok = field(mv, F_DISCOUNTS, &v) == 1 && v.t == MP_ARR && v.u == (uint64_t)m->order;
        nw_mp q = {mv->p, mv->n, mv->at[F_DISCOUNTS]};
        nw_mpv tmp;
        if (ok) nw_mp_read(&q, &tmp);
        for (int o = 0; ok && o < m->order; o++) {
            nw_mpv row;
            ok = nw_mp_read(&q, &row) == 0 && row.t == MP_ARR && row.u == 3;
            for (int j = 0; ok && j < 3; j++) {
                nw_mpv x;
                ok = nw_mp_read(&q, &x) == 0 && x.t == MP_FLOAT && 0.0 < x.f && x.f <= j + 1;
                m->d[o][j] = x.f;
            }
        }
        if (!ok) return nw_fail(err, NW_E_FORMAT, "metadata field 'discounts' is invalid");
        for (int o = 1; o < m->order; o++) {
            double *d = m->d[o];
            if (!(1 - d[0] < 2 - d[1] && 2 - d[1] < 3 - d[2]))
                return nw_fail(err, NW_E_FORMAT, "discounts of order %d do not keep 1-D1 < 2-D2 < 3-D3", o + 1);
        }
        if (field(mv, F_NOTES, &v) == 1) {
            int okn = v.t == MP_MAP;
            nw_mp q2 = {mv->p, mv->n, mv->at[F_NOTES]};
            nw_mpv t2;
            nw_mp_read(&q2, &t2);
            for (uint64_t j = 0; okn && j < v.u; j++) {
                nw_mpv key, val;
                nw_mp_read(&q2, &key);
                okn = key.t == MP_STR && nw_mp_read(&q2, &val) == 0 && val.t == MP_STR;
            }
            if (!okn) return nw_fail(err, NW_E_FORMAT, "metadata field 'discount_notes' is invalid");
        }
    } else if (m->order == 3) { /* a 1.5 JM bigram has no lambda3 (and Python ignores one) */
        if ((m->lam3 = 0, need_num(mv, F_LAMBDA3, 0.0, 1.0, &m->lam3, err)))
            return nw_fail(err, NW_E_FORMAT, "metadata field 'lambda3' is invalid");
        if (m->lam3 > MAX_LAMBDA) m->lam3 = MAX_LAMBDA;
    }
    if (m->ef) { /* dropped_contexts: [D2] or [D2, D3], 0 <= D2 <= n+3, 0 <= D3 <= b (§7.18) */
        int ok = field(mv, F_DROPPED, &v) == 1 && v.t == MP_ARR && v.u == (uint64_t)(m->order - 1);
        nw_mp q = {mv->p, mv->n, mv->at[F_DROPPED]};
        nw_mpv tmp, x;
        if (ok) nw_mp_read(&q, &tmp);
        m->d2 = m->d3 = 0;
        for (int j = 0; ok && j < m->order - 1; j++) {
            ok = nw_mp_read(&q, &x) == 0 && x.t == MP_POS && x.u <= (j == 0 ? (uint64_t)m->n + 3 : m->b);
            if (ok && x.t == MP_POS) *(j == 0 ? &m->d2 : &m->d3) = x.u;
        }
        if (!ok) return nw_fail(err, NW_E_FORMAT, "metadata field 'dropped_contexts' is invalid");
    }
    return NW_OK;
}

/* -- open ------------------------------------------------------------------------------- */

static const uint64_t ITEM[5] = {1, 1, 2, 4, 8};

static nw_arr arr_of(const nw_model *m, const sec *s) {
    nw_arr a;
    a.p = m->map + s->off;
    a.w = (int)ITEM[s->code];
    a.n = s->len / ITEM[s->code];
    return a;
}

static int sparse_ok(const nw_arr *idx, const nw_arr *val, uint64_t end, int val_is_ones) {
    /* store._sorted_sparse: as long as each other, indices increasing below end, values >= 1 */
    if (!val_is_ones && idx->n != val->n) return 0;
    if (!idx->n) return 1;
    if (nw_at(idx, idx->n - 1) >= end) return 0;
    for (uint64_t j = 1; j < idx->n; j++)
        if (nw_at(idx, j) <= nw_at(idx, j - 1)) return 0;
    if (!val_is_ones)
        for (uint64_t j = 0; j < val->n; j++)
            if (nw_at(val, j) < 1) return 0;
    return 1;
}

static nw_status check_perm(const nw_arr *arr, const nw_arr *inv, uint64_t mlen, const char *label, nw_error *err) {
    for (uint64_t i = 0; i < mlen; i++) {
        uint32_t x = nw_at(arr, i);
        if (x >= mlen || nw_at(inv, i) >= mlen || nw_at(inv, x) != i)
            return nw_fail(err, NW_E_FORMAT, "section %s is not a valid permutation", label);
    }
    return NW_OK;
}

/* one chunked Elias-Fano sequence as the section table gives it (opened by open_lists) */
typedef struct ef_raw {
    const uint8_t *head, *stream;
    uint64_t head_n, stream_len;
    int hw;
} ef_raw;

static void put32(uint8_t *p, uint64_t x) {
    p[0] = (uint8_t)x;
    p[1] = (uint8_t)(x >> 8);
    p[2] = (uint8_t)(x >> 16);
    p[3] = (uint8_t)(x >> 24);
}

/* inverse of permutation `a` of 0 .. len-1 into `inv` (u32 entries), refusing a non-permutation */
static nw_status invert(const nw_arr *a, uint64_t len, uint8_t *inv, const char *label, nw_error *err) {
    memset(inv, 0xFF, 4 * len);
    for (uint64_t i = 0; i < len; i++) {
        uint32_t x = nw_at(a, i);
        const uint8_t *q = inv + 4 * (uint64_t)x;
        if (x >= len || (q[0] & q[1] & q[2] & q[3]) != 0xFF)
            return nw_fail(err, NW_E_FORMAT, "section %s is not a valid permutation", label);
        put32(inv + 4 * (uint64_t)x, i);
    }
    return NW_OK;
}

/* One sequence opened (§7.18's checks on load). */
static nw_status open_seq(nw_ef *e, const ef_raw *raw, int q, uint64_t count, int strict, nw_error *err) {
    char label[16];
    snprintf(label, sizeof label, "%sH/%sB", SEQ_TAGS[q], SEQ_TAGS[q]);
    const ef_raw *r = &raw[q];
    /* the n-gram-sized sequences' chunk headers are checked when a query reads them (as Python
     * does): opening stays O(vocabulary) */
    int ngram_sized = q == S_SEF || q == S_TPT || q == S_TEF || q == S_TDI || q == S_TDV;
    return nw_ef_open(e, label, r->head, r->head_n, r->hw, r->stream, r->stream_len, count, strict, !ngram_sized, err);
}

/* Every value of a sequence (count values), each ≤ limit, as u32 into out. */
static nw_status decode_seq(const nw_ef *e, int q, uint64_t limit, uint8_t *out, nw_error *err) {
    uint64_t vals[NW_EF_CHUNK];
    for (uint64_t c = 0; c < e->chunks; c++) {
        int cnt;
        if (nw_ef_chunk(e, c, vals, &cnt))
            return nw_fail(err, NW_E_FORMAT, "sections %sH/%sB: chunk %llu does not decode to its values", SEQ_TAGS[q], SEQ_TAGS[q],
                           (unsigned long long)c);
        for (int k = 0; k < cnt; k++) {
            if (vals[k] > limit)
                return nw_fail(err, NW_E_FORMAT, "sections %sH/%sB: value %llu above %llu", SEQ_TAGS[q], SEQ_TAGS[q],
                               (unsigned long long)vals[k], (unsigned long long)limit);
            put32(out + 4 * (c * NW_EF_CHUNK + (uint64_t)k), vals[k]);
        }
    }
    return NW_OK;
}

/* Values stored as their prefix sums (count + 1 values from 0, §7.18): the count values,
 * each ≥ lo (0 or 1) and within 32 bits, as u32 into out. */
static nw_status decode_sums(const ef_raw *raw, int q, uint64_t count, uint64_t lo, uint8_t *out, nw_error *err) {
    nw_ef e;
    nw_status st = open_seq(&e, raw, q, count + 1, lo > 0, err);
    if (st) return st;
    uint64_t vals[NW_EF_CHUNK], prev = 0;
    for (uint64_t c = 0; c < e.chunks; c++) {
        int cnt;
        if (nw_ef_chunk(&e, c, vals, &cnt))
            return nw_fail(err, NW_E_FORMAT, "sections %sH/%sB: chunk %llu does not decode to its values", SEQ_TAGS[q], SEQ_TAGS[q],
                           (unsigned long long)c);
        for (int k = 0; k < cnt; k++) {
            uint64_t j = c * NW_EF_CHUNK + (uint64_t)k;
            if (j == 0 ? vals[k] != 0 : vals[k] < prev + lo || vals[k] - prev > 0xFFFFFFFFu)
                return nw_fail(err, NW_E_FORMAT, "sections %sH/%sB do not hold prefix sums from 0 of %s32-bit values", SEQ_TAGS[q],
                               SEQ_TAGS[q], lo ? "positive " : "");
            if (j) put32(out + 4 * (j - 1), vals[k] - prev);
            prev = vals[k];
        }
    }
    return NW_OK;
}

/* Format 1.6 (§7.18 "Checks on load"): every sequence's headers and stream; ROWS, UNIG,
 * HIST, HN13 and HDRI/HDRV decoded into u32 arrays as a 1.4/1.5 file holds them; TKID and
 * ALPH checked to be permutations and inverted into IDTK and APOS. Every other check and
 * query then reads these arrays as in 1.4; SUCC, the trigram lists and TDRI/TDRV stay coded
 * (m->sef, tpt, tef, tdi, tdv). */
static nw_status open_lists(nw_model *m, const ef_raw *raw, nw_error *err) {
    uint64_t n = m->n, npos = n + 2, nhist = n + 3, b = m->b;
    if (m->TKID.n != n || m->ALPH.n != npos)
        return nw_fail(err, NW_E_FORMAT, "section %s holds %llu entries, expected %llu", m->TKID.n != n ? "TKID" : "ALPH",
                       (unsigned long long)(m->TKID.n != n ? m->TKID.n : m->ALPH.n),
                       (unsigned long long)(m->TKID.n != n ? n : npos));
    if (b > 0xFFFFFFFFu) /* ROWS is made as u32 below (a 1.4 file's ROWS is u32 too) */
        return nw_fail(err, NW_E_FORMAT, "a format 1.6 file of %llu bigrams: more than this library reads", (unsigned long long)b);
    nw_status st;
    nw_ef rwe;
    if ((st = open_seq(&rwe, raw, S_RWE, nhist + 1, 0, err))) return st;
    if ((st = open_seq(&m->sef, raw, S_SEF, b, 1, err))) return st;
    if (nw_ef_first(&m->sef, m->sef.chunks) > nhist * npos)
        return nw_fail(err, NW_E_FORMAT, "sections SEFH/SEFB: a successor past the last row");
    if (m->order == 3) {
        uint64_t t = m->t;
        if ((st = open_seq(&m->tpt, raw, S_TPT, b + 1, 0, err))) return st;
        if (nw_ef_first(&m->tpt, 0) != 0 || nw_ef_first(&m->tpt, m->tpt.chunks) != t + 1)
            return nw_fail(err, NW_E_FORMAT, "sections TPTH/TPTB do not run from 0 to %llu", (unsigned long long)t);
        if ((st = open_seq(&m->tef, raw, S_TEF, t, 1, err))) return st;
        if ((st = open_seq(&m->tdi, raw, S_TDI, m->d3, 1, err))) return st;
        if ((st = open_seq(&m->tdv, raw, S_TDV, m->d3 + 1, 1, err))) return st;
        if (nw_ef_first(&m->tdi, m->tdi.chunks) > b || nw_ef_first(&m->tdv, 0) != 0)
            return nw_fail(err, NW_E_FORMAT, "sections TDIH/TDVH do not index bigram entries, or their sums do not start at 0");
    }
    /* one allocation, u32 each: ROWS (n+4), IDTK (n), APOS (n+2), UNIG (n+2), HIST (n+3),
     * HN13 (3·(n+3), KN), HDRI and HDRV (D2 each) */
    uint64_t words = (nhist + 1) + n + npos + npos + nhist + (m->kn ? 3 * nhist : 0) + 2 * m->d2;
    m->lists = (uint8_t *)malloc(4 * words + 4);
    if (!m->lists) return nw_fail(err, NW_E_NOMEM, "out of memory");
    uint8_t *rows = m->lists, *idtk = rows + 4 * (nhist + 1), *apos = idtk + 4 * n, *unig = apos + 4 * npos;
    uint8_t *hist = unig + 4 * npos, *hn13 = hist + 4 * nhist, *hdri = hn13 + (m->kn ? 12 * nhist : 0), *hdrv = hdri + 4 * m->d2;
    if ((st = decode_seq(&rwe, S_RWE, b, rows, err))) return st;
    m->ROWS = (nw_arr){rows, nhist + 1, 4};
    if ((st = invert(&m->TKID, n, idtk, "TKID", err))) return st;
    m->IDTK = (nw_arr){idtk, n, 4};
    if ((st = invert(&m->ALPH, npos, apos, "ALPH", err))) return st;
    m->APOS = (nw_arr){apos, npos, 4};
    if ((st = decode_sums(raw, S_UNE, npos, 0, unig, err))) return st;
    m->UNIG = (nw_arr){unig, npos, 4};
    if ((st = decode_sums(raw, S_HSE, nhist, 0, hist, err))) return st;
    m->HIST = (nw_arr){hist, nhist, 4};
    if (m->kn) { /* N1 and N2 per row from their prefix sums, N3+ = row length - N1 - N2 (>= 0) */
        uint8_t *tmp = (uint8_t *)malloc(8 * nhist); /* N1 then N2, for the open only */
        if (!tmp) return nw_fail(err, NW_E_NOMEM, "out of memory");
        if ((st = decode_sums(raw, S_N1E, nhist, 0, tmp, err)) || (st = decode_sums(raw, S_N2E, nhist, 0, tmp + 4 * nhist, err))) {
            free(tmp);
            return st;
        }
        nw_arr n12 = {tmp, 2 * nhist, 4};
        for (uint64_t v = 0; v < nhist; v++) {
            uint64_t a1 = nw_at(&n12, v), a2 = nw_at(&n12, nhist + v), r0 = nw_at(&m->ROWS, v), r1 = nw_at(&m->ROWS, v + 1);
            if (r1 < r0 || a1 + a2 > r1 - r0) {
                free(tmp);
                return nw_fail(err, NW_E_FORMAT, "sections N1EH/N2EH count more entries than row %llu has", (unsigned long long)v);
            }
            put32(hn13 + 12 * v, a1);
            put32(hn13 + 12 * v + 4, a2);
            put32(hn13 + 12 * v + 8, (r1 - r0) - a1 - a2);
        }
        free(tmp);
        m->HN13 = (nw_arr){hn13, 3 * nhist, 4};
    }
    nw_ef hdi;
    if ((st = open_seq(&hdi, raw, S_HDI, m->d2, 1, err))) return st;
    if (m->d2 && nw_ef_first(&hdi, hdi.chunks) > nhist)
        return nw_fail(err, NW_E_FORMAT, "sections HDIH/HDIB: a history id not below %llu", (unsigned long long)nhist);
    if ((st = decode_seq(&hdi, S_HDI, nhist - 1, hdri, err))) return st;
    m->HDRI = (nw_arr){hdri, m->d2, 4};
    if ((st = decode_sums(raw, S_HDV, m->d2, 1, hdrv, err))) return st;
    m->HDRV = (nw_arr){hdrv, m->d2, 4};
    return NW_OK;
}

static nw_status check_arrays(nw_model *m, const ef_raw *raw, nw_error *err) {
    uint64_t n = m->n, npos = n + 2, nhist = n + 3, b = m->b;
    uint64_t topk = 0;
    for (int l = 0; l < m->n_levels; l++) topk += m->level_nb[l];
    nw_status st;
    if (m->ef && (st = open_lists(m, raw, err))) return st;
    struct { const char *label; const nw_arr *a; uint64_t want; } exp[] = {
        {"TKID", &m->TKID, n}, {"IDTK", &m->IDTK, n}, {"ALPH", &m->ALPH, npos}, {"APOS", &m->APOS, npos},
        {"KEY4", &m->KEY4, n}, {"TOPK", &m->TOPK, topk * TOPK_FANOUT}, {"UNIG", &m->UNIG, npos},
        {"ROWS", &m->ROWS, nhist + 1}, {"SUCC", &m->SUCC, m->ef ? 0 : b}, /* 1.6: read through m->sef */
        {"SEGE", &m->SEGE, m->SEGS.n}, {"SKYP", &m->SKYP, m->SEGS.n + 1}, {"SKYC", &m->SKYC, m->SEGS.n * m->sky_k},
        {"HIST", &m->HIST, m->has_hist ? nhist : m->HIST.n}, {"DISO", &m->DISO, m->DISI.n + 1},
    };
    for (size_t i = 0; i < sizeof exp / sizeof exp[0]; i++)
        if (exp[i].a->n != exp[i].want)
            return nw_fail(err, NW_E_FORMAT, "section %s holds %llu entries, expected %llu", exp[i].label,
                           (unsigned long long)exp[i].a->n, (unsigned long long)exp[i].want);
    /* the bigram level's values through the file's codec (codec.check) */
    if (m->codec->check(m, &m->v2, b, err)) return err ? err->code : NW_E_FORMAT;
    if ((st = check_perm(&m->TKID, &m->IDTK, n, "TKID", err))) return st;
    if ((st = check_perm(&m->ALPH, &m->APOS, npos, "ALPH", err))) return st;
    if (nw_at(&m->ALPH, n) != n || nw_at(&m->ALPH, n + 1) != n + 1)
        return nw_fail(err, NW_E_FORMAT, "section ALPH does not end with the reserved symbols");
    uint64_t sum = 0;
    for (uint64_t i = 0; i < npos; i++) sum += nw_at(&m->UNIG, i);
    if (sum != m->total) return nw_fail(err, NW_E_FORMAT, "unigram counts do not add up to the stored total");
    struct { const char *label; const nw_arr *a; uint64_t end; } offs[] = {{"ROWS", &m->ROWS, b}, {"DISO", &m->DISO, m->disb_len}};
    for (int i = 0; i < 2; i++) {
        const nw_arr *a = offs[i].a;
        int ok = nw_at(a, 0) == 0 && nw_at(a, a->n - 1) == offs[i].end;
        for (uint64_t j = 1; ok && j < a->n; j++) ok = nw_at(a, j) >= nw_at(a, j - 1);
        if (!ok)
            return nw_fail(err, NW_E_FORMAT, "section %s offsets are not increasing from 0 to %llu", offs[i].label,
                           (unsigned long long)offs[i].end);
    }
    const nw_arr *disi = &m->DISI;
    if (disi->n) {
        int ok = nw_at(disi, disi->n - 1) < n;
        for (uint64_t j = 1; ok && j < disi->n; j++) ok = nw_at(disi, j) > nw_at(disi, j - 1);
        if (!ok) return nw_fail(err, NW_E_FORMAT, "section DISI is not an increasing list of word ids");
    }
    /* store._check_escaped_counts: every escaped pair count is at most its row's c(v) */
    const nw_arr *bigi = &m->v2.esc_i, *bigc = &m->v2.esc_v;
    if (m->codec == &nw_codec_exact && bigi->n) {
        for (uint64_t j = 0; j < bigi->n; j++)
            if (nw_at(bigi, j) >= b) return nw_fail(err, NW_E_FORMAT, "section BIGI points past the last pair");
        for (uint64_t j = 0; j < bigi->n; j++) {
            uint32_t x = nw_at(bigi, j);
            /* the row v with ROWS[v] <= x < ROWS[v+1]: searchsorted(ROWS, x, "right") - 1 */
            uint64_t lo = 0, hi = m->ROWS.n;
            while (lo < hi) {
                uint64_t mid = lo + (hi - lo) / 2;
                if (nw_at(&m->ROWS, mid) <= x) lo = mid + 1; else hi = mid;
            }
            uint32_t v = (uint32_t)(lo - 1);
            if (nw_at(bigc, j) > nw_hist(m, v))
                return nw_fail(err, NW_E_FORMAT, "section BIGC holds a pair count above its history count");
        }
    }
    if (m->minor < 3) return NW_OK;
    /* store._check_ngram_arrays (the always-on part) */
    if (m->kn && !m->ef && m->HN13.n != 3 * nhist)
        return nw_fail(err, NW_E_FORMAT, "section HN13 holds %llu entries, expected %llu", (unsigned long long)m->HN13.n,
                       (unsigned long long)(3 * nhist));
    if (!sparse_ok(&m->HDRI, &m->HDRV, nhist, 0))
        return nw_fail(err, NW_E_FORMAT, "section HDRI/HDRV: indices not increasing below %llu, or a zero value",
                       (unsigned long long)nhist);
    for (uint64_t j = 0; j < m->HDRI.n; j++)
        if (nw_at(&m->HDRV, j) > nw_at(&m->HIST, nw_at(&m->HDRI, j)))
            return nw_fail(err, NW_E_FORMAT, "section HDRV holds dropped mass above its context total");
    if (m->order == 3) {
        uint64_t t = m->t;
        if (m->codec->check(m, &m->v3, t, err)) return err ? err->code : NW_E_FORMAT;
        if (!m->ef && nw_codec_exact.check(m, &m->tlen, b, err)) return err ? err->code : NW_E_FORMAT;
        uint64_t nseg = m->TSGS.n;
        struct { const char *label; const nw_arr *a; uint64_t want; } e3[] = {
            {"TCTB", &m->TCTB, m->ef ? 0 : b / CTX_BLOCK + 1}, {"TSUC", &m->TSUC, m->ef ? 0 : t}, /* 1.6: m->tpt, m->tef */
            {"TLNV", &m->TLNV, 4 * m->TLNI.n},
            {"TDRV", &m->TDRV, m->TDRI.n}, {"TSGE", &m->TSGE, nseg}, {"TSKP", &m->TSKP, nseg + 1},
            {"TSKC", &m->TSKC, nseg * m->sky_k},
        };
        for (size_t i = 0; i < sizeof e3 / sizeof e3[0]; i++)
            if (e3[i].a->n != e3[i].want)
                return nw_fail(err, NW_E_FORMAT, "section %s holds %llu entries, expected %llu", e3[i].label,
                               (unsigned long long)e3[i].a->n, (unsigned long long)e3[i].want);
        const nw_arr *tctb = &m->TCTB;
        int ok = m->ef || nw_at(tctb, 0) == 0;
        for (uint64_t j = 1; ok && j < tctb->n; j++) ok = nw_at(tctb, j) >= nw_at(tctb, j - 1);
        uint64_t end = m->ef ? t : ok ? nw_at(tctb, tctb->n - 1) : 0;
        for (uint64_t i = (b / CTX_BLOCK) * CTX_BLOCK; ok && !m->ef && i < b; i++) {
            uint64_t len;
            if (nw_codec_exact.value(&m->tlen, i, &len)) return nw_fail(err, NW_E_FORMAT, "damaged model: escaped value without an entry");
            end += len;
        }
        if (!ok || end != t)
            return nw_fail(err, NW_E_FORMAT, "sections TCTB/TLEN do not run from 0 to %llu", (unsigned long long)t);
        if (!sparse_ok(&m->TLNI, &m->TLNI, b, 1))
            return nw_fail(err, NW_E_FORMAT, "section TLNI/TLNV: indices not increasing below %llu", (unsigned long long)b);
        if (!sparse_ok(&m->TDRI, &m->TDRV, b, 0))
            return nw_fail(err, NW_E_FORMAT, "section TDRI/TDRV: indices not increasing below %llu, or a zero value",
                           (unsigned long long)b);
        if (nw_at(&m->TSKP, 0) != 0 || nw_at(&m->TSKP, m->TSKP.n - 1) != m->TSKI.n)
            return nw_fail(err, NW_E_FORMAT, "section TSKP does not run from 0 to the end of TSKI");
    }
    return NW_OK;
}

/* P1 of every id (estimators.kn.unigram_floor, or c(w)/N), in the oracle's operation order */
static nw_status make_floor(nw_model *m, nw_error *err) {
    uint64_t npos = (uint64_t)m->n + 2;
    m->floor = (double *)malloc(sizeof(double) * npos);
    if (!m->floor) return nw_fail(err, NW_E_NOMEM, "out of memory");
    double total = (double)m->total;
    if (m->kn) {
        const double *d = m->d[0];
        uint64_t n1 = 0, n2 = 0, n3 = 0;
        for (uint64_t i = 0; i < npos; i++) {
            uint32_t a = nw_at(&m->UNIG, i);
            n1 += a == 1;
            n2 += a == 2;
            n3 += a >= 3;
        }
        double g0 = (d[0] * (double)n1 + d[1] * (double)n2 + d[2] * (double)n3) / total;
        double inv = 1.0 / (double)npos;
        for (uint64_t i = 0; i < npos; i++) {
            uint32_t a = nw_at(&m->UNIG, i);
            double disc = a >= 3 ? d[2] : a >= 2 ? d[1] : a >= 1 ? d[0] : 0.0;
            double x = (double)a - disc;
            m->floor[i] = (x > 0.0 ? x : 0.0) / total + g0 * inv;
        }
    } else {
        for (uint64_t i = 0; i < npos; i++) m->floor[i] = (double)nw_at(&m->UNIG, i) / total;
    }
    if (!m->jm_path) /* Model: the general scorer checks its floor on load */
        for (uint64_t i = 0; i < npos; i++)
            if (!(m->floor[i] >= 0.0 && m->floor[i] <= 1.0 + 1e-9))
                return nw_fail(err, NW_E_FORMAT, "damaged model data: a unigram probability outside [0, 1]");
    return NW_OK;
}

static nw_status parse(nw_model *m, uint64_t size, nw_error *err) {
    const uint8_t *buf = m->map;
    if (memcmp(buf, MAGIC, 8) != 0) return nw_fail(err, NW_E_FORMAT, "not a nextword model (bad magic bytes)");
    if (nw_crc32(buf, 28) != (uint32_t)le(buf + 28, 4)) return nw_fail(err, NW_E_FORMAT, "header checksum mismatch (damaged file)");
    m->major = (uint16_t)le(buf + 8, 2);
    m->minor = (uint16_t)le(buf + 10, 2);
    if (m->major != 1 || m->minor > EF_MINOR)
        return nw_fail(err, NW_E_VERSION, "unsupported format version %u.%u (this library reads 1.0 to 1.2 and 1.4 to 1.6)",
                       m->major, m->minor);
    if (m->minor == 3)
        return nw_fail(err, NW_E_VERSION,
                       "format 1.3 (the first Kneser-Ney/trigram layout) is no longer read; retrain the model to write format 1.4");
    uint32_t n_sec = (uint32_t)le(buf + 12, 4);
    uint64_t fsize = le(buf + 16, 8);
    if (fsize != size)
        return nw_fail(err, NW_E_FORMAT, "file is %llu bytes but its header says %llu (truncated or appended)",
                       (unsigned long long)size, (unsigned long long)fsize);
    if (n_sec < 1 || n_sec > 64) return nw_fail(err, NW_E_FORMAT, "bad section count %u", n_sec);
    uint64_t table_end = 32 + 32 * (uint64_t)n_sec;
    if (table_end > size) return nw_fail(err, NW_E_FORMAT, "section table runs past the end of the file");
    if (nw_crc32(buf + 32, table_end - 32) != (uint32_t)le(buf + 24, 4))
        return nw_fail(err, NW_E_FORMAT, "section table checksum mismatch (damaged file)");
    sec secs[N_SPECS];
    memset(secs, 0, sizeof secs);
    char seen[64][4];
    uint64_t prev_end = table_end;
    for (uint32_t i = 0; i < n_sec; i++) {
        const uint8_t *e = buf + 32 + 32 * (uint64_t)i;
        char tag[5] = {(char)e[0], (char)e[1], (char)e[2], (char)e[3], 0};
        for (uint32_t j = 0; j < i; j++)
            if (memcmp(seen[j], tag, 4) == 0) return nw_fail(err, NW_E_FORMAT, "section %.4s appears twice", tag);
        memcpy(seen[i], tag, 4);
        int code = e[4];
        uint64_t off = le(e + 8, 8), len = le(e + 16, 8);
        if (code > 4) return nw_fail(err, NW_E_FORMAT, "section %.4s has unknown element type %d", tag, code);
        if (off % 8 || off < prev_end || off > size || len > size - off)
            return nw_fail(err, NW_E_FORMAT, "section %.4s has bad offset %llu or length %llu", tag,
                           (unsigned long long)off, (unsigned long long)len);
        if (len % ITEM[code])
            return nw_fail(err, NW_E_FORMAT, "section %.4s length %llu is not a multiple of %llu", tag,
                           (unsigned long long)len, (unsigned long long)ITEM[code]);
        for (uint64_t q = prev_end; q < off; q++)
            if (buf[q]) return nw_fail(err, NW_E_FORMAT, "non-zero padding before section %.4s", tag);
        prev_end = off + len;
        int k = spec_index(tag);
        if (k >= 0) {
            sec *s = &secs[k];
            memcpy(s->tag, tag, 5);
            s->code = code;
            s->off = off;
            s->len = len;
            s->crc = (uint32_t)le(e + 24, 4);
            s->present = 1;
        }
    }
    if ((8 - prev_end % 8) % 8 != size - prev_end) return nw_fail(err, NW_E_FORMAT, "unexpected bytes after the last section");
    for (uint64_t q = prev_end; q < size; q++)
        if (buf[q]) return nw_fail(err, NW_E_FORMAT, "unexpected bytes after the last section");
    /* the sections a 1.6 file replaces may not be in it (the 1.6 ones are refused in older
     * files below, with the other sections a file's kind does not have) */
    for (int i = 0; i < N_SPECS; i++) {
        if (m->minor == EF_MINOR && IN(SPECS[i].tag, REMOVED_16) && secs[i].present)
            return nw_fail(err, NW_E_FORMAT, "format 1.6 files have no section %s (its lists are Elias-Fano coded)", SPECS[i].tag);
    }
    int hist = spec_index("HIST");
    if (m->minor < 3) {
        if (secs[hist].present != (m->minor == 2))
            return nw_fail(err, NW_E_FORMAT, "section HIST must be present exactly in format 1.2 (pruned) files");
        for (int i = N_REQUIRED; i < N_SPECS; i++)
            if (i != hist && secs[i].present)
                return nw_fail(err, NW_E_FORMAT, "format 1.%u files have no Kneser-Ney or trigram sections", m->minor);
    }
    for (int i = 0; i < N_REQUIRED; i++)
        if (!secs[i].present && !(m->minor == EF_MINOR && IN(SPECS[i].tag, REMOVED_16)))
            return nw_fail(err, NW_E_FORMAT, "missing sections %s", SPECS[i].tag);
    for (int i = 0; i < N_SPECS; i++)
        if (secs[i].present && SPECS[i].crc_on_load && nw_crc32(buf + secs[i].off, secs[i].len) != secs[i].crc)
            return nw_fail(err, NW_E_FORMAT, "section %s checksum mismatch (damaged file)", SPECS[i].tag);
    const sec *meta = &secs[0];
    if (meta->len > (1u << 20)) return nw_fail(err, NW_E_FORMAT, "metadata of %llu bytes is too large", (unsigned long long)meta->len);
    meta_view mv;
    nw_status st;
    if ((st = read_meta(m, buf + meta->off, meta->len, size, &mv, err))) return st;
    if ((st = read_kind(m, &mv, err))) return st;
    if (m->minor >= 3) {
        /* exactly the optional sections of the file's kind */
        for (int i = N_REQUIRED; i < N_SPECS; i++) {
            const char *tag = SPECS[i].tag;
            int want = !strcmp(tag, "HIST") || !strcmp(tag, "HDRI") || !strcmp(tag, "HDRV") || (m->kn && !strcmp(tag, "HN13"));
            for (size_t j = 0; j < sizeof TRIGRAM_TAGS / sizeof TRIGRAM_TAGS[0]; j++)
                if (m->order == 3 && !strcmp(tag, TRIGRAM_TAGS[j])) want = 1;
            if (m->ef) { /* §7.18: the replaced sections out, the sequences in */
                if (IN(tag, REMOVED_16)) want = 0;
                for (int q = 0; q < S_COUNT; q++)
                    if (!strncmp(tag, SEQ_TAGS[q], 3) && (tag[3] == 'H' || tag[3] == 'B')) want = seq_wanted(q, m->kn, m->order);
            }
            if (want != secs[i].present)
                return nw_fail(err, NW_E_FORMAT, "a %s order-%d file: section %s is %s", m->kn ? "kn" : "jm", m->order, tag,
                               want ? "missing" : "unexpected");
        }
        if (m->order == 3) {
            if ((st = need_int(&mv, F_TRIGRAMS, 0, 4294967295.0, &m->t, err))) return st;
            if ((st = need_int(&mv, F_TCTX, 0, 4294967295.0, &m->tctx, err))) return st;
            nw_mpv v;
            if (field(&mv, F_TSUMMIN, &v) != 1 || v.t == MP_BOOL || nw_mp_num(&v) != SUMMARY_MIN ||
                !(nw_mp_is_int(&v) || v.t == MP_FLOAT))
                return nw_fail(err, NW_E_FORMAT, "metadata field 'trigram_summary_min' is invalid");
            if (mv.at[F_TSKYMIN] == (size_t)-1) m->tsky_min = m->sky_min;
            else if ((st = need_int(&mv, F_TSKYMIN, 0, 4294967295.0, &m->tsky_min, err))) return st;
        }
    }
    /* element types (§5): id = u16 if n + 3 < 65535 else u32 */
    int idw = m->n + 3 < 0xFFFF ? 2 : 3;
    for (int i = 0; i < N_SPECS; i++) {
        if (!secs[i].present) continue;
        int want;
        switch (SPECS[i].kind) {
        case K_RAW: want = 0; break;
        case K_ID: want = idw; break;
        case K_U1: want = 1; break;
        case K_U4: want = 3; break;
        case K_U48: want = secs[i].code == 4 ? 4 : 3; break;
        default: want = secs[i].code == 2 ? 2 : 3; break;
        }
        if (secs[i].code != want)
            return nw_fail(err, NW_E_FORMAT, "section %s has element type code %d, expected %d", SPECS[i].tag, secs[i].code, want);
    }
#define A(name) m->name = arr_of(m, &secs[spec_index(#name)])
#define OPT(name) if (secs[spec_index(#name)].present) A(name)
    A(TKID); A(ALPH); A(KEY4); A(TOPK); A(SEGS); A(SEGE); A(SKYP); A(SKYI); A(SKYC); A(DISI); A(DISO);
    OPT(IDTK); OPT(APOS); OPT(ROWS); OPT(SUCC); OPT(UNIG); /* 1.6: these five made on open (open_lists) */
    OPT(HIST); OPT(HN13); OPT(HDRI); OPT(HDRV); OPT(TCTB); OPT(TSUC); OPT(TLNI); OPT(TLNV); OPT(TDRI); OPT(TDRV);
    OPT(TSGS); OPT(TSGE); OPT(TSKP); OPT(TSKI); OPT(TSKC);
    m->v2.small = arr_of(m, &secs[spec_index("CNTS")]);
    m->v2.esc_i = arr_of(m, &secs[spec_index("BIGI")]);
    m->v2.esc_v = arr_of(m, &secs[spec_index("BIGC")]);
    m->v2.tags = "CNTS/BIGI/BIGC";
    m->v2.count = m->b;
    m->v2.bits = m->quant_bits;
    ef_raw raw[S_COUNT];
    memset(raw, 0, sizeof raw);
    if (m->ef) {
        for (int q = 0; q < S_COUNT; q++) {
            if (!seq_wanted(q, m->kn, m->order)) continue;
            char th[5], tb[5];
            snprintf(th, sizeof th, "%sH", SEQ_TAGS[q]);
            snprintf(tb, sizeof tb, "%sB", SEQ_TAGS[q]);
            const sec *h = &secs[spec_index(th)], *b = &secs[spec_index(tb)];
            raw[q].head = buf + h->off;
            raw[q].hw = (int)ITEM[h->code];
            raw[q].head_n = h->len / ITEM[h->code];
            raw[q].stream = buf + b->off;
            raw[q].stream_len = b->len;
        }
    }
    if (m->order == 3) {
        m->v3.small = arr_of(m, &secs[spec_index("TVAL")]);
        m->v3.esc_i = arr_of(m, &secs[spec_index("TBGI")]);
        m->v3.esc_v = arr_of(m, &secs[spec_index("TBGC")]);
        m->v3.tags = "TVAL/TBGI/TBGC";
        m->v3.count = m->t;
        m->v3.bits = m->quant_bits;
    }
    if (m->order == 3 && !m->ef) {
        m->tlen.small = arr_of(m, &secs[spec_index("TLEN")]);
        m->tlen.esc_i = arr_of(m, &secs[spec_index("TLEI")]);
        m->tlen.esc_v = arr_of(m, &secs[spec_index("TLEV")]);
        m->tlen.tags = "TLEN/TLEI/TLEV";
        m->tlen.count = m->b;
    }
    m->has_hist = secs[hist].present || m->ef; /* 1.6: HIST from its prefix sums (open_lists) */
    /* Model._general: a JM bigram with dropped mass (HDRI not empty) goes through the general scorer */
    m->jm_path = !m->kn && m->order == 2 && !(secs[spec_index("HDRI")].present && secs[spec_index("HDRI")].len > 0) &&
                 !(m->ef && m->d2 > 0);
    m->disb = buf + secs[spec_index("DISB")].off;
    m->disb_len = secs[spec_index("DISB")].len;
    /* stored λ above 0.999 are clamped, not refused (Model.lambda_clamped) */
    if (m->lam > MAX_LAMBDA) m->lam = MAX_LAMBDA;
    for (int j = 0; j <= m->n_bounds; j++)
        if (m->lambdas[j] > MAX_LAMBDA) m->lambdas[j] = MAX_LAMBDA;
    /* TOPK levels (store.topk_levels) */
    {
        uint64_t size_l = TOPK_FANOUT, off = 0;
        m->n_levels = 0;
        for (;;) {
            uint64_t nb = (m->n + size_l - 1) / size_l;
            if (m->n_levels >= NW_LEVELS_MAX) return nw_fail(err, NW_E_FORMAT, "too many top-list levels");
            m->level_off[m->n_levels] = off;
            m->level_nb[m->n_levels++] = nb;
            off += nb * TOPK_FANOUT;
            if (nb <= TOPK_FANOUT) break;
            size_l *= TOPK_FANOUT;
        }
    }
    /* only now does libmarisa see the trie (its CRC matched above) */
    const sec *trie = &secs[1];
    size_t n_keys = 0;
    m->trie = nw_trie_map(buf + trie->off, trie->len, &n_keys);
    if (!m->trie) return nw_fail(err, NW_E_FORMAT, "damaged model: the trie cannot be mapped");
    if (n_keys != m->n) return nw_fail(err, NW_E_FORMAT, "trie holds %zu words, metadata says %u", n_keys, m->n);
    if ((st = check_arrays(m, raw, err))) return st;
    return make_floor(m, err);
}

static const uint8_t MIX_MAGIC[8] = {0x89, 'N', 'W', 'X', '\r', '\n', 0x1a, '\n'};

nw_status nw_open(const char *path, nw_model **out, nw_error *err) { return nw_open_ex(path, 0, out, err); }

nw_status nw_open_ex(const char *path, unsigned flags, nw_model **out, nw_error *err) {
    if (!path || !out) return nw_fail(err, NW_E_ARG, "path and out must not be NULL");
    *out = NULL;
    if (flags & ~(unsigned)NW_OPEN_SKIP_PART_DIGESTS) return nw_fail(err, NW_E_ARG, "unknown flags 0x%x", flags);
    /* a mixture file (docs/FORMAT.md §13) is told apart by its magic */
    uint8_t head[8];
    int fd = open(path, O_RDONLY | O_CLOEXEC);
    if (fd < 0) return nw_fail(err, NW_E_IO, "%s: cannot open model: %s", path, strerror(errno));
    ssize_t got = read(fd, head, sizeof head);
    close(fd);
    if (got != (ssize_t)sizeof head || memcmp(head, MIX_MAGIC, sizeof head) != 0) return nw_open_model(path, out, err);
    nw_model *m = (nw_model *)calloc(1, sizeof *m);
    if (!m) return nw_fail(err, NW_E_NOMEM, "out of memory");
    snprintf(m->path, sizeof m->path, "%s", path);
    nw_status st = nw_mix_open(path, m, !(flags & NW_OPEN_SKIP_PART_DIGESTS), err);
    if (st != NW_OK) {
        nw_close(m);
        return st;
    }
    *out = m;
    return NW_OK;
}

nw_status nw_open_model(const char *path, nw_model **out, nw_error *err) {
    if (!path || !out) return nw_fail(err, NW_E_ARG, "path and out must not be NULL");
    *out = NULL;
    nw_model *m = (nw_model *)calloc(1, sizeof *m);
    if (!m) return nw_fail(err, NW_E_NOMEM, "out of memory");
    snprintf(m->path, sizeof m->path, "%s", path);
    int fd = open(path, O_RDONLY | O_CLOEXEC);
    if (fd < 0) {
        free(m);
        return nw_fail(err, NW_E_IO, "%s: cannot open model: %s", path, strerror(errno));
    }
    struct stat stt;
    if (fstat(fd, &stt) != 0) {
        close(fd);
        free(m);
        return nw_fail(err, NW_E_IO, "%s: cannot open model: %s", path, strerror(errno));
    }
    uint64_t size = (uint64_t)stt.st_size;
    if (size < 32) {
        close(fd);
        free(m);
        return nw_fail(err, NW_E_FORMAT, "%s: not a nextword model (only %llu bytes)", path, (unsigned long long)size);
    }
    void *p = mmap(NULL, (size_t)size, PROT_READ, MAP_PRIVATE, fd, 0);
    close(fd);
    if (p == MAP_FAILED) {
        free(m);
        return nw_fail(err, NW_E_IO, "%s: cannot map model: %s", path, strerror(errno));
    }
    m->map = (uint8_t *)p;
    m->map_len = (size_t)size;
    nw_status st = parse(m, size, err);
    if (st != NW_OK) {
        if (err) { /* prefix the path, as the Python reader does */
            char msg[sizeof err->message];
            snprintf(msg, sizeof msg, "%.100s: %.210s", path, err->message);
            memcpy(err->message, msg, sizeof msg);
        }
        nw_close(m);
        return st;
    }
    *out = m;
    return NW_OK;
}

void nw_close(nw_model *m) {
    if (!m) return;
    nw_mix_free(m->mix);
    if (m->trie) nw_trie_free(m->trie);
    if (m->map) munmap(m->map, m->map_len);
    free(m->floor);
    free(m->lists);
    free(m);
}

nw_status nw_info_get(const nw_model *m, nw_info *o) {
    if (!m || !o) return NW_E_ARG;
    memset(o, 0, sizeof *o);
    if (m->mix) return nw_mix_info(m, o);
    o->text_rules = m->text_rules;
    o->n_parts = 0;
    o->major = m->major;
    o->minor = m->minor;
    o->n_words = m->n;
    o->bigrams = m->b;
    o->trigrams = m->order == 3 ? m->t : 0;
    o->total = m->total;
    o->order = m->order;
    o->kneser_ney = m->kn;
    o->lambda = m->kn ? 0.0 : m->lam;
    o->lambda3 = m->order == 3 && !m->kn ? m->lam3 : 0.0;
    o->codec = m->codec->name;
    o->file_size = m->map_len;
    return NW_OK;
}

const char *nw_status_name(nw_status s) {
    static const char *const names[] = {"NW_OK", "NW_E_ARG", "NW_E_IO", "NW_E_FORMAT", "NW_E_VERSION",
                                        "NW_E_UNSUPPORTED", "NW_E_DAMAGED", "NW_E_BUFFER", "NW_E_NOMEM"};
    return (unsigned)s < sizeof names / sizeof names[0] ? names[s] : "NW_E_UNKNOWN";
}
