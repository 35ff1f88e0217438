/* Mixtures of model files (docs/FORMAT.md §13; nextword/mix.py in Python).
 *
 * Opening: the .nwx file is checked field by field as nextword.mix.read_mix checks it
 * (magic, size, MessagePack, version, 1..8 parts with path/bytes/sha256, weights finite,
 * >= 0 and summing to 1 within 1e-6, `fitted` a map), the weights are divided by their
 * correctly rounded sum twice (read_mix normalises them and MixedModel normalises them
 * again: the same float operations give the same weights), each part must have its
 * recorded size and SHA-256, is opened with every check of a model file, and all parts
 * must share one text-rules version. The union vocabulary is then built once by merging
 * the parts' alphabetical key orders: a union word's number is its position in the sorted
 * union, so "key ascending" on ties is "number ascending".
 *
 * Queries: P(w | h) = Σ_i w_i·P_i(w | h), summed in part order from 0.0 (a part that lacks
 * the word adds w_i·0.0), each P_i being the single-model query's own float. The top k
 * follow MixedModel._rank_c: each part's exact top m (m = max(k, smallest skyband depth),
 * then four times deeper), words met in some list scored exactly when they may still enter
 * (their upper bound reaches the k-th lower bound), stopping once the k-th exact score is
 * strictly above Σ w_i·(last probability of list i). A single model's list stops at
 * NW_MAX_K entries; a query that would need deeper lists scores every union word of the
 * prefix instead (exact too, only slower). Every buffer is allocated with the session:
 * a query allocates nothing.
 */
#define _POSIX_C_SOURCE 200809L
#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "internal.h"
#include "meta.h"
#include "query.h"

#define MIX_MAX_BYTES (1u << 20) /* mix._MAX_MIX_BYTES */
#define SUM_TOLERANCE 1e-6       /* mix._SUM_TOLERANCE */
#define NONE 0xFFFFFFFFu
#define SEEN_MAX (NW_MAX_PARTS * NW_MAX_K)
#define HASH_SLOTS 2048 /* a power of two above 2 * SEEN_MAX */
#define UNKNOWN (-1.0)  /* a part probability not looked up yet (probabilities are >= 0) */

struct nw_mix {
    int P;
    nw_model *part[NW_MAX_PARTS];
    double w[NW_MAX_PARTS];
    int by_weight[NW_MAX_PARTS]; /* spelling preference: weight descending, then part order */
    uint32_t U;                  /* union vocabulary size */
    uint32_t *ids;               /* ids[c * P + j]: part j's id of union word c, or NONE */
    uint32_t *canon[NW_MAX_PARTS]; /* canon[j][id]: union number of part j's word id */
    int depth;                   /* first list depth: the parts' smallest skyband_k */
    int order, text_rules;
    uint64_t file_size;
};

struct nw_mix_session {
    nw_session *part[NW_MAX_PARTS];
    cstate cs[NW_MAX_PARTS];
    uint64_t lo[NW_MAX_PARTS], hi[NW_MAX_PARTS];
    /* words met in the parts' lists this round */
    int nseen;
    uint32_t seen_c[SEEN_MAX];
    double row[SEEN_MAX][NW_MAX_PARTS];
    double low[SEEN_MAX], high[SEEN_MAX];
    uint32_t hkey[HASH_SLOTS], hgen[HASH_SLOTS], gen;
    uint16_t hslot[HASH_SLOTS];
    cand exact[SEEN_MAX];
    int nexact;
    double kth[NW_MAX_K]; /* the k largest lower ends, descending */
    cand best[NW_MAX_K];  /* the brute-force path's k best */
    int nbest;
};

/* -- SHA-256 (FIPS 180-4) ----------------------------------------------------------------- */

typedef struct sha256_ctx {
    uint32_t h[8];
    uint64_t len;
    uint8_t block[64];
    size_t used;
} sha256_ctx;

static const uint32_t SHA_K[64] = {
    0x428a2f98u, 0x71374491u, 0xb5c0fbcfu, 0xe9b5dba5u, 0x3956c25bu, 0x59f111f1u, 0x923f82a4u, 0xab1c5ed5u,
    0xd807aa98u, 0x12835b01u, 0x243185beu, 0x550c7dc3u, 0x72be5d74u, 0x80deb1feu, 0x9bdc06a7u, 0xc19bf174u,
    0xe49b69c1u, 0xefbe4786u, 0x0fc19dc6u, 0x240ca1ccu, 0x2de92c6fu, 0x4a7484aau, 0x5cb0a9dcu, 0x76f988dau,
    0x983e5152u, 0xa831c66du, 0xb00327c8u, 0xbf597fc7u, 0xc6e00bf3u, 0xd5a79147u, 0x06ca6351u, 0x14292967u,
    0x27b70a85u, 0x2e1b2138u, 0x4d2c6dfcu, 0x53380d13u, 0x650a7354u, 0x766a0abbu, 0x81c2c92eu, 0x92722c85u,
    0xa2bfe8a1u, 0xa81a664bu, 0xc24b8b70u, 0xc76c51a3u, 0xd192e819u, 0xd6990624u, 0xf40e3585u, 0x106aa070u,
    0x19a4c116u, 0x1e376c08u, 0x2748774cu, 0x34b0bcb5u, 0x391c0cb3u, 0x4ed8aa4au, 0x5b9cca4fu, 0x682e6ff3u,
    0x748f82eeu, 0x78a5636fu, 0x84c87814u, 0x8cc70208u, 0x90befffau, 0xa4506cebu, 0xbef9a3f7u, 0xc67178f2u};

#define ROTR(x, n) (((x) >> (n)) | ((x) << (32 - (n))))

static void sha256_block(uint32_t h[8], const uint8_t *p) {
    uint32_t w[64];
    for (int t = 0; t < 16; t++)
        w[t] = (uint32_t)p[4 * t] << 24 | (uint32_t)p[4 * t + 1] << 16 | (uint32_t)p[4 * t + 2] << 8 | p[4 * t + 3];
    for (int t = 16; t < 64; t++) {
        uint32_t s0 = ROTR(w[t - 15], 7) ^ ROTR(w[t - 15], 18) ^ (w[t - 15] >> 3);
        uint32_t s1 = ROTR(w[t - 2], 17) ^ ROTR(w[t - 2], 19) ^ (w[t - 2] >> 10);
        w[t] = w[t - 16] + s0 + w[t - 7] + s1;
    }
    uint32_t a = h[0], b = h[1], c = h[2], d = h[3], e = h[4], f = h[5], g = h[6], hh = h[7];
    for (int t = 0; t < 64; t++) {
        uint32_t t1 = hh + (ROTR(e, 6) ^ ROTR(e, 11) ^ ROTR(e, 25)) + ((e & f) ^ (~e & g)) + SHA_K[t] + w[t];
        uint32_t t2 = (ROTR(a, 2) ^ ROTR(a, 13) ^ ROTR(a, 22)) + ((a & b) ^ (a & c) ^ (b & c));
        hh = g; g = f; f = e; e = d + t1; d = c; c = b; b = a; a = t1 + t2;
    }
    h[0] += a; h[1] += b; h[2] += c; h[3] += d; h[4] += e; h[5] += f; h[6] += g; h[7] += hh;
}

static void sha256_init(sha256_ctx *c) {
    static const uint32_t H0[8] = {0x6a09e667u, 0xbb67ae85u, 0x3c6ef372u, 0xa54ff53au,
                                   0x510e527fu, 0x9b05688cu, 0x1f83d9abu, 0x5be0cd19u};
    memcpy(c->h, H0, sizeof H0);
    c->len = 0;
    c->used = 0;
}

static void sha256_update(sha256_ctx *c, const uint8_t *p, size_t n) {
    c->len += n;
    if (c->used) {
        size_t take = 64 - c->used < n ? 64 - c->used : n;
        memcpy(c->block + c->used, p, take);
        c->used += take;
        p += take;
        n -= take;
        if (c->used < 64) return;
        sha256_block(c->h, c->block);
        c->used = 0;
    }
    for (; n >= 64; p += 64, n -= 64) sha256_block(c->h, p);
    memcpy(c->block, p, n);
    c->used = n;
}

static void sha256_final(sha256_ctx *c, uint8_t out[32]) {
    uint64_t bits = c->len * 8;
    uint8_t pad[72] = {0x80};
    size_t npad = (c->used < 56 ? 56 : 120) - c->used;
    for (int i = 0; i < 8; i++) pad[npad + (size_t)i] = (uint8_t)(bits >> (56 - 8 * i));
    sha256_update(c, pad, npad + 8);
    for (int i = 0; i < 8; i++)
        for (int b = 0; b < 4; b++) out[4 * i + b] = (uint8_t)(c->h[i] >> (24 - 8 * b));
}

void nw_sha256(const void *data, size_t len, uint8_t out[32]) {
    sha256_ctx c;
    sha256_init(&c);
    sha256_update(&c, (const uint8_t *)data, len);
    sha256_final(&c, out);
}

/* -- the correctly rounded sum (Shewchuk's exact partials, rounded half-even as math.fsum) -- */

nw_status nw_exact_sum(const double *x, size_t n, double *out) {
    double p[64];
    size_t np = 0;
    *out = 0.0;
    for (size_t k = 0; k < n; k++) {
        double v = x[k];
        if (!isfinite(v)) return NW_E_ARG;
        size_t i = 0;
        for (size_t j = 0; j < np; j++) { /* exact: v + p[j] = hi + lo */
            double y = p[j];
            if (fabs(v) < fabs(y)) { double t = v; v = y; y = t; }
            double hi = v + y;
            double lo = y - (hi - v);
            if (lo != 0.0) p[i++] = lo;
            v = hi;
        }
        if (!isfinite(v)) return NW_E_ARG; /* an intermediate overflow (math.fsum raises) */
        np = i;
        if (np >= sizeof p / sizeof p[0]) return NW_E_ARG; /* never for doubles: at most ~40 partials */
        if (v != 0.0) p[np++] = v; /* zeros are not kept (so fsum([-0.0]) is 0.0) */
    }
    double hi = 0.0;
    if (np > 0) {
        hi = p[--np];
        double lo = 0.0;
        while (np > 0) { /* add the partials from the top until the sum is inexact */
            double xx = hi, y = p[--np];
            hi = xx + y;
            double yr = hi - xx;
            lo = y - yr;
            if (lo != 0.0) break;
        }
        /* half-way case: round toward the sign of the next partial (round-half-even of the exact sum) */
        if (np > 0 && ((lo < 0.0 && p[np - 1] < 0.0) || (lo > 0.0 && p[np - 1] > 0.0))) {
            double y = lo * 2.0, xx = hi + y, yr = xx - hi;
            if (y == yr) hi = xx;
        }
    }
    *out = hi;
    return NW_OK;
}

/* -- paths as Python's posixpath computes them (abspath, normpath, dirname, join) -------- */

/* posixpath.normpath, in place (the result is never longer); 0, or -1 out of memory */
static int normpath(char *path) {
    size_t n = strlen(path);
    if (n == 0) { strcpy(path, "."); return 0; }
    int slashes = path[0] == '/' ? (n >= 2 && path[1] == '/' && (n < 3 || path[2] != '/') ? 2 : 1) : 0;
    char *copy = (char *)malloc(n + 1);
    size_t *start = (size_t *)malloc(sizeof(size_t) * (n + 1)), *len = (size_t *)malloc(sizeof(size_t) * (n + 1));
    if (!copy || !start || !len) { free(copy); free(start); free(len); return -1; }
    memcpy(copy, path, n + 1);
    size_t nc = 0, i = 0;
    while (i <= n) { /* path.split('/') */
        size_t s0 = i;
        while (i < n && copy[i] != '/') i++;
        size_t l = i - s0;
        i++;
        if (l == 0 || (l == 1 && copy[s0] == '.')) continue;
        int dotdot = l == 2 && copy[s0] == '.' && copy[s0 + 1] == '.';
        int last_dotdot = nc > 0 && len[nc - 1] == 2 && copy[start[nc - 1]] == '.' && copy[start[nc - 1] + 1] == '.';
        if (!dotdot || (!slashes && nc == 0) || last_dotdot) {
            start[nc] = s0;
            len[nc++] = l;
        } else if (nc > 0) {
            nc--;
        }
    }
    size_t w = 0;
    for (int k = 0; k < slashes; k++) path[w++] = '/';
    for (size_t c = 0; c < nc; c++) {
        if (c) path[w++] = '/';
        memcpy(path + w, copy + start[c], len[c]);
        w += len[c];
    }
    path[w] = 0;
    if (w == 0) strcpy(path, ".");
    free(copy);
    free(start);
    free(len);
    return 0;
}

/* the folder of abspath(name), malloc'd; NULL on failure */
static char *folder_of(const char *name) {
    char cwd[4096];
    size_t n = strlen(name);
    char *abs;
    if (name[0] == '/') {
        abs = (char *)malloc(n + 1);
        if (!abs) return NULL;
        memcpy(abs, name, n + 1);
    } else {
        if (!getcwd(cwd, sizeof cwd)) return NULL;
        size_t c = strlen(cwd);
        abs = (char *)malloc(c + n + 2);
        if (!abs) return NULL;
        memcpy(abs, cwd, c);
        size_t at = c;
        if (c == 0 || cwd[c - 1] != '/') abs[at++] = '/';
        memcpy(abs + at, name, n + 1);
    }
    if (normpath(abs)) { free(abs); return NULL; }
    /* posixpath.dirname */
    char *slash = strrchr(abs, '/');
    size_t head = slash ? (size_t)(slash - abs) + 1 : 0;
    int all_slashes = 1;
    for (size_t i = 0; i < head; i++) all_slashes &= abs[i] == '/';
    if (head && !all_slashes)
        while (head > 0 && abs[head - 1] == '/') head--;
    abs[head] = 0;
    return abs;
}

/* normpath(join(folder, rel)), malloc'd */
static char *part_path(const char *folder, const uint8_t *rel, size_t rlen) {
    size_t f = strlen(folder);
    char *p = (char *)malloc(f + rlen + 2);
    if (!p) return NULL;
    size_t at = 0;
    if (rel[0] != '/') {
        memcpy(p, folder, f);
        at = f;
        if (f > 0 && folder[f - 1] != '/') p[at++] = '/';
    }
    memcpy(p + at, rel, rlen);
    p[at + rlen] = 0;
    if (normpath(p)) { free(p); return NULL; }
    return p;
}

/* -- reading the mixture file ----------------------------------------------------------- */

#define BAD(...) nw_fail(err, NW_E_FORMAT, __VA_ARGS__)

/* the value of str key `name` in the map whose entries start at `at` (the last one wins, as
 * in a Python dict); 1 found, 0 absent */
static int map_get(const uint8_t *p, size_t n, size_t at, uint64_t entries, const char *name, nw_mpv *v, size_t *v_at) {
    nw_mp m = {p, n, at};
    int found = 0;
    for (uint64_t j = 0; j < entries; j++) {
        nw_mpv key;
        if (nw_mp_read(&m, &key)) return found;
        size_t here = m.i;
        if (nw_mp_skip(&m, 1)) return found;
        if (nw_mp_str_eq(&key, name)) {
            nw_mp q = {p, n, here};
            if (nw_mp_read(&q, v) == 0) {
                found = 1;
                if (v_at) *v_at = q.i;
            }
        }
    }
    return found;
}

static int is_int(const nw_mpv *v) { return v->t == MP_POS || v->t == MP_NEG; }

static void describe(const nw_mpv *v, char *out, size_t cap) {
    switch (v->t) {
    case MP_NIL: snprintf(out, cap, "None"); break;
    case MP_BOOL: snprintf(out, cap, v->u ? "True" : "False"); break;
    case MP_POS: snprintf(out, cap, "%llu", (unsigned long long)v->u); break;
    case MP_NEG: snprintf(out, cap, "%lld", (long long)v->neg); break;
    case MP_FLOAT: snprintf(out, cap, "%.17g", v->f); break;
    case MP_STR: snprintf(out, cap, "'%.*s'", (int)(v->len < 80 ? v->len : 80), (const char *)v->s); break;
    default: snprintf(out, cap, "a value of MessagePack type %d", (int)v->t); break;
    }
}

typedef struct part_rec {
    const uint8_t *path;
    size_t path_len;
    uint64_t bytes;
    uint8_t sha[32];
} part_rec;

static int hexval(uint8_t c) { return c >= '0' && c <= '9' ? c - '0' : c >= 'a' && c <= 'f' ? c - 'a' + 10 : -1; }

/* read_mix: every field of the map (data: the whole file, n bytes) */
static nw_status read_fields(const uint8_t *data, size_t n, part_rec *parts, int *n_parts, double *weights,
                             nw_error *err) {
    char what[128];
    if (n < 8 || memcmp(data, "\x89NWX\r\n\x1a\n", 8) != 0) return BAD("not a nextword mixture file (bad magic)");
    nw_mp m = {data, n, 8};
    /* Python's msgpack nests at most 1024 containers deep; nw_mp_skip stops past depth 512 */
    if (nw_mp_skip(&m, 512 - 1024) || m.i != n) return BAD("damaged mixture data");
    m.i = 8;
    nw_mpv top, v;
    nw_mp_read(&m, &top);
    if (top.t != MP_MAP) return BAD("mixture data is not a map");
    size_t body = m.i;
    /* version: [int, int], major 1, minor <= 0 */
    size_t at = 0;
    if (!map_get(data, n, body, top.u, "version", &v, &at) || v.t != MP_ARR || v.u != 2)
        return BAD("mixture field 'version' is invalid");
    nw_mp q = {data, n, at};
    nw_mpv major, minor;
    nw_mp_read(&q, &major);
    if (major.t == MP_ARR || major.t == MP_MAP || !is_int(&major)) return BAD("mixture field 'version' is invalid");
    nw_mp_read(&q, &minor);
    if (!is_int(&minor)) return BAD("mixture field 'version' is invalid");
    int64_t vmaj = major.t == MP_POS ? (major.u > INT64_MAX ? INT64_MAX : (int64_t)major.u) : major.neg;
    int64_t vmin = minor.t == MP_POS ? (minor.u > INT64_MAX ? INT64_MAX : (int64_t)minor.u) : minor.neg;
    if (vmaj != 1 || vmin > 0)
        return nw_fail(err, NW_E_VERSION, "mixture version %lld.%lld is not supported (this library reads 1.0-1.0)",
                       (long long)vmaj, (long long)vmin);
    /* parts: 1..8 maps of path / bytes / sha256 */
    if (!map_get(data, n, body, top.u, "parts", &v, &at) || v.t != MP_ARR || v.u < 1 || v.u > NW_MAX_PARTS)
        return BAD("mixture field 'parts' must list 1 to %d parts", NW_MAX_PARTS);
    *n_parts = (int)v.u;
    q.i = at;
    for (int i = 0; i < *n_parts; i++) {
        nw_mpv pm;
        size_t start = q.i;
        nw_mp_read(&q, &pm);
        if (pm.t != MP_MAP) return BAD("part %d is not a map", i);
        size_t entries = q.i;
        q.i = start;
        nw_mp_skip(&q, 1); /* q now at the next part */
        nw_mpv path, bytes, sha;
        int has_p = map_get(data, n, entries, pm.u, "path", &path, NULL);
        if (!has_p || path.t != MP_STR || path.len == 0 || memchr(path.s, 0, path.len)) {
            if (has_p) describe(&path, what, sizeof what); else snprintf(what, sizeof what, "None");
            return BAD("part %d: field 'path' is invalid: %s", i, what);
        }
        int has_b = map_get(data, n, entries, pm.u, "bytes", &bytes, NULL);
        if (!has_b || bytes.t != MP_POS) {
            if (has_b) describe(&bytes, what, sizeof what); else snprintf(what, sizeof what, "None");
            return BAD("part %d: field 'bytes' is invalid: %s", i, what);
        }
        int has_s = map_get(data, n, entries, pm.u, "sha256", &sha, NULL);
        int ok = has_s && sha.t == MP_STR && sha.len == 64;
        for (uint32_t c = 0; ok && c < 64; c++) ok = hexval(sha.s[c]) >= 0;
        if (!ok) {
            if (has_s) describe(&sha, what, sizeof what); else snprintf(what, sizeof what, "None");
            return BAD("part %d: field 'sha256' is invalid: %s", i, what);
        }
        parts[i].path = path.s;
        parts[i].path_len = path.len;
        parts[i].bytes = bytes.u;
        for (int b = 0; b < 32; b++) parts[i].sha[b] = (uint8_t)(hexval(sha.s[2 * b]) << 4 | hexval(sha.s[2 * b + 1]));
    }
    /* weights: one per part, finite numbers >= 0 summing to 1 within 1e-6 (mix.check_weights) */
    if (!map_get(data, n, body, top.u, "weights", &v, &at) || v.t != MP_ARR) return BAD("mixture field 'weights' is invalid");
    if (v.u != (uint64_t)*n_parts)
        return BAD("mixture field 'weights': %llu weights given for %d parts; give one weight per part", (unsigned long long)v.u,
                   *n_parts);
    q.i = at;
    for (int i = 0; i < *n_parts; i++) {
        nw_mpv e;
        size_t start = q.i;
        nw_mp_read(&q, &e);
        q.i = start;
        nw_mp_skip(&q, 1);
        if (!(is_int(&e) || e.t == MP_FLOAT) || !isfinite(nw_mp_num(&e))) {
            describe(&e, what, sizeof what);
            return BAD("mixture field 'weights': a weight must be a finite number, got %s", what);
        }
        if (nw_mp_num(&e) < 0) {
            describe(&e, what, sizeof what);
            return BAD("mixture field 'weights': a weight must not be negative, got %s", what);
        }
        weights[i] = nw_mp_num(&e);
    }
    /* fitted: optional, a map */
    if (map_get(data, n, body, top.u, "fitted", &v, NULL) && v.t != MP_NIL && v.t != MP_MAP)
        return BAD("mixture field 'fitted' is not a map");
    return NW_OK;
}

/* check_weights' normalisation: each weight divided by the correctly rounded sum */
static nw_status normalise(double *w, int n, nw_error *err) {
    double total;
    if (nw_exact_sum(w, (size_t)n, &total) != NW_OK) return BAD("mixture field 'weights': their sum overflows");
    if (fabs(total - 1.0) > SUM_TOLERANCE) return BAD("mixture field 'weights': weights must sum to 1, got %.17g", total);
    for (int i = 0; i < n; i++) w[i] = w[i] / total;
    return NW_OK;
}

static nw_status file_sha256(const char *path, uint8_t out[32], nw_error *err) {
    int fd = open(path, O_RDONLY | O_CLOEXEC);
    if (fd < 0) return nw_fail(err, NW_E_IO, "cannot read %s: %s", path, strerror(errno));
    sha256_ctx c;
    sha256_init(&c);
    uint8_t buf[1 << 16];
    for (;;) {
        ssize_t got = read(fd, buf, sizeof buf);
        if (got < 0) {
            if (errno == EINTR) continue;
            close(fd);
            return nw_fail(err, NW_E_IO, "cannot read %s: %s", path, strerror(errno));
        }
        if (got == 0) break;
        sha256_update(&c, buf, (size_t)got);
    }
    close(fd);
    sha256_final(&c, out);
    return NW_OK;
}

/* -- the union vocabulary ----------------------------------------------------------------- */

static int key_cmp(const char *a, size_t na, const char *b, size_t nb) {
    size_t n = na < nb ? na : nb;
    int r = memcmp(a, b, n);
    return r ? r : na < nb ? -1 : na > nb;
}

typedef struct walker {
    const nw_model *m;
    void *cursor;
    uint64_t pos;
    uint32_t id;
    char *key;
    size_t len, cap;
    int done;
} walker;

/* the key at the walker's next position; it must sort strictly after the current one */
static nw_status walk_load(walker *w, int first, nw_error *err) {
    const nw_model *m = w->m;
    if (w->pos >= m->n) { w->done = 1; return NW_OK; }
    uint32_t id = nw_at(&m->ALPH, w->pos);
    if (id >= m->n) return BAD("%s: damaged model: alphabetical position %llu holds id %u", m->path, (unsigned long long)w->pos, id);
    const char *key;
    size_t len;
    if (nw_trie_restore(m->trie, w->cursor, nw_at(&m->IDTK, id), &key, &len))
        return BAD("%s: damaged model: trie reverse lookup failed", m->path);
    if (!first && key_cmp(key, len, w->key, w->len) <= 0)
        return BAD("%s: damaged model: keys are not in alphabetical order at position %llu", m->path, (unsigned long long)w->pos);
    if (len + 1 > w->cap) {
        size_t cap = (len + 1) * 2;
        char *k = (char *)realloc(w->key, cap);
        if (!k) return nw_fail(err, NW_E_NOMEM, "out of memory");
        w->key = k;
        w->cap = cap;
    }
    memcpy(w->key, key, len);
    w->len = len;
    w->id = id;
    return NW_OK;
}

static nw_status build_union(struct nw_mix *x, nw_error *err) {
    int P = x->P;
    walker wk[NW_MAX_PARTS];
    memset(wk, 0, sizeof wk);
    uint64_t total = 0;
    nw_status st = NW_OK;
    for (int j = 0; j < P; j++) total += x->part[j]->n;
    if (total > 0xFFFFFFF0u) return BAD("the union vocabulary is too large");
    x->ids = (uint32_t *)malloc(sizeof(uint32_t) * (size_t)total * (size_t)P);
    if (!x->ids) return nw_fail(err, NW_E_NOMEM, "out of memory");
    for (int j = 0; j < P; j++) {
        x->canon[j] = (uint32_t *)malloc(sizeof(uint32_t) * x->part[j]->n);
        wk[j].m = x->part[j];
        wk[j].cursor = nw_cursor_new();
        if (!x->canon[j] || !wk[j].cursor) { st = nw_fail(err, NW_E_NOMEM, "out of memory"); goto done; }
        memset(x->canon[j], 0xFF, sizeof(uint32_t) * x->part[j]->n);
        if ((st = walk_load(&wk[j], 1, err))) goto done;
    }
    uint32_t c = 0;
    for (;;) {
        int lead = -1;
        for (int j = 0; j < P; j++)
            if (!wk[j].done && (lead < 0 || key_cmp(wk[j].key, wk[j].len, wk[lead].key, wk[lead].len) < 0)) lead = j;
        if (lead < 0) break;
        int same[NW_MAX_PARTS];
        for (int j = 0; j < P; j++)
            same[j] = !wk[j].done && key_cmp(wk[j].key, wk[j].len, wk[lead].key, wk[lead].len) == 0;
        for (int j = 0; j < P; j++) {
            uint32_t *row = x->ids + (size_t)c * (size_t)P;
            row[j] = same[j] ? wk[j].id : NONE;
            if (!same[j]) continue;
            if (x->canon[j][wk[j].id] != NONE) { st = BAD("%s: damaged model: a word id appears twice in ALPH", wk[j].m->path); goto done; }
            x->canon[j][wk[j].id] = c;
        }
        for (int j = 0; j < P; j++)
            if (same[j]) {
                wk[j].pos++;
                if ((st = walk_load(&wk[j], 0, err))) goto done;
            }
        c++;
    }
    x->U = c;
done:
    for (int j = 0; j < P; j++) {
        if (wk[j].cursor) nw_cursor_free(wk[j].cursor);
        free(wk[j].key);
    }
    return st;
}

/* -- opening ---------------------------------------------------------------------------- */

void nw_mix_free(struct nw_mix *x) {
    if (!x) return;
    for (int j = 0; j < x->P; j++) {
        nw_close(x->part[j]);
        free(x->canon[j]);
    }
    free(x->ids);
    free(x);
}

static nw_status open_parts(struct nw_mix *x, const char *name, const part_rec *parts, int verify, nw_error *err) {
    char *folder = folder_of(name);
    if (!folder) return nw_fail(err, NW_E_IO, "%s: cannot resolve the mixture's folder", name);
    nw_status st = NW_OK;
    for (int i = 0; i < x->P; i++) {
        char *pp = part_path(folder, parts[i].path, parts[i].path_len);
        if (!pp) { st = nw_fail(err, NW_E_NOMEM, "out of memory"); break; }
        struct stat sb;
        if (stat(pp, &sb) != 0 || !S_ISREG(sb.st_mode)) {
            st = nw_fail(err, NW_E_IO, "%s: part %d (%s) is missing", name, i, pp);
            free(pp);
            break;
        }
        x->file_size += (uint64_t)sb.st_size;
        if ((uint64_t)sb.st_size != parts[i].bytes) {
            st = BAD("%s: part %d (%s) has changed since mixing: %llu bytes, recorded %llu", name, i, pp,
                     (unsigned long long)sb.st_size, (unsigned long long)parts[i].bytes);
        } else {
            uint8_t digest[32];
            if (verify && (st = file_sha256(pp, digest, err)) == NW_OK && memcmp(digest, parts[i].sha, 32) != 0)
                st = BAD("%s: part %d (%s) has changed since mixing (SHA-256 differs)", name, i, pp);
            if (st == NW_OK && (st = nw_open_model(pp, &x->part[i], err)) != NW_OK && err) {
                char msg[sizeof err->message];
                snprintf(msg, sizeof msg, "%.80s: part %d: %.200s", name, i, err->message);
                memcpy(err->message, msg, sizeof msg);
            }
        }
        free(pp);
        if (st) break;
    }
    free(folder);
    return st;
}

nw_status nw_mix_open(const char *name, nw_model *shell, int verify_parts, nw_error *err) {
    int fd = open(name, O_RDONLY | O_CLOEXEC);
    if (fd < 0) return nw_fail(err, NW_E_IO, "%s: cannot open mixture: %s", name, strerror(errno));
    struct stat sb;
    if (fstat(fd, &sb) != 0) {
        close(fd);
        return nw_fail(err, NW_E_IO, "%s: cannot open mixture: %s", name, strerror(errno));
    }
    if ((uint64_t)sb.st_size > MIX_MAX_BYTES) {
        close(fd);
        return BAD("%s: a mixture file is at most %u bytes; this one has %llu", name, MIX_MAX_BYTES,
                   (unsigned long long)sb.st_size);
    }
    size_t n = (size_t)sb.st_size;
    uint8_t *data = (uint8_t *)malloc(n ? n : 1);
    if (!data) { close(fd); return nw_fail(err, NW_E_NOMEM, "out of memory"); }
    size_t got = 0;
    while (got < n) {
        ssize_t r = read(fd, data + got, n - got);
        if (r < 0 && errno == EINTR) continue;
        if (r <= 0) break;
        got += (size_t)r;
    }
    close(fd);
    if (got != n) { free(data); return nw_fail(err, NW_E_IO, "%s: cannot read mixture", name); }
    part_rec parts[NW_MAX_PARTS];
    double w[NW_MAX_PARTS];
    int P = 0;
    nw_status st = read_fields(data, n, parts, &P, w, err);
    if (st == NW_OK) st = normalise(w, P, err);  /* read_mix */
    if (st == NW_OK) st = normalise(w, P, err);  /* MixedModel.__init__ normalises the weights again */
    if (st != NW_OK) {
        free(data);
        if (err) {
            char msg[sizeof err->message];
            snprintf(msg, sizeof msg, "%.100s: %.210s", name, err->message);
            memcpy(err->message, msg, sizeof msg);
        }
        return st;
    }
    struct nw_mix *x = (struct nw_mix *)calloc(1, sizeof *x);
    if (!x) { free(data); return nw_fail(err, NW_E_NOMEM, "out of memory"); }
    shell->mix = x;
    x->P = P;
    x->file_size = n;
    memcpy(x->w, w, sizeof(double) * (size_t)P);
    st = open_parts(x, name, parts, verify_parts, err);
    free(data);
    if (st) return st;
    x->order = 2;
    x->depth = 0;
    x->text_rules = x->part[0]->text_rules;
    for (int j = 0; j < P; j++) {
        const nw_model *m = x->part[j];
        if (m->order > x->order) x->order = m->order;
        if (x->depth == 0 || (int)m->sky_k < x->depth) x->depth = (int)m->sky_k;
        if (m->text_rules != x->text_rules)
            return BAD("%s: parts were counted with different text rules: part 0 (version %d), part %d (version %d)", name,
                       x->text_rules, j, m->text_rules);
    }
    for (int j = 0; j < P; j++) x->by_weight[j] = j;
    for (int a = 1; a < P; a++) /* stable insertion sort by weight descending */
        for (int b = a; b > 0 && x->w[x->by_weight[b]] > x->w[x->by_weight[b - 1]]; b--) {
            int t = x->by_weight[b]; x->by_weight[b] = x->by_weight[b - 1]; x->by_weight[b - 1] = t;
        }
    if ((st = build_union(x, err)) && err) {
        char msg[sizeof err->message];
        snprintf(msg, sizeof msg, "%.100s: %.210s", name, err->message);
        memcpy(err->message, msg, sizeof msg);
    }
    return st;
}

nw_status nw_mix_info(const nw_model *m, nw_info *o) {
    const struct nw_mix *x = m->mix;
    o->major = 1;
    o->minor = 0;
    o->n_words = x->U;
    o->order = x->order;
    o->kneser_ney = -1;
    o->codec = "mixture";
    o->file_size = x->file_size;
    o->text_rules = x->text_rules;
    o->n_parts = x->P;
    for (int j = 0; j < x->P; j++) o->weights[j] = x->w[j];
    return NW_OK;
}

/* -- sessions ------------------------------------------------------------------------------ */

nw_status nw_mix_session_new(const nw_model *m, nw_session *s, nw_error *err) {
    const struct nw_mix *x = m->mix;
    struct nw_mix_session *ms = (struct nw_mix_session *)calloc(1, sizeof *ms);
    if (!ms) return nw_fail(err, NW_E_NOMEM, "out of memory");
    s->mix = ms;
    for (int j = 0; j < x->P; j++) {
        nw_status st = nw_q_session_new(x->part[j], &ms->part[j], err);
        if (st) return st;
    }
    return NW_OK;
}

void nw_mix_session_free(struct nw_mix_session *ms) {
    if (!ms) return;
    for (int j = 0; j < NW_MAX_PARTS; j++) nw_q_session_free(ms->part[j]);
    free(ms);
}

/* -- queries --------------------------------------------------------------------------------- */

static int better(double a, uint32_t ca, double b, uint32_t cb) { return a > b || (a == b && ca < cb); }

static int cmp_cand(const void *pa, const void *pb) {
    const cand *a = (const cand *)pa, *b = (const cand *)pb;
    return better(a->score, a->id, b->score, b->id) ? -1 : better(b->score, b->id, a->score, a->id) ? 1 : 0;
}

/* the slot of union word c this round, made (with `fresh` as its row) if new */
static int seen_slot(struct nw_mix_session *ms, uint32_t c, const double *fresh, int P) {
    uint32_t h = (c * 2654435761u) & (HASH_SLOTS - 1);
    while (ms->hgen[h] == ms->gen) {
        if (ms->hkey[h] == c) return ms->hslot[h];
        h = (h + 1) & (HASH_SLOTS - 1);
    }
    int slot = ms->nseen++;
    ms->hgen[h] = ms->gen;
    ms->hkey[h] = c;
    ms->hslot[h] = (uint16_t)slot;
    ms->seen_c[slot] = c;
    memcpy(ms->row[slot], fresh, sizeof(double) * (size_t)P);
    return slot;
}

static void next_gen(struct nw_mix_session *ms) {
    if (++ms->gen == 0) { /* wrapped: forget every old mark */
        memset(ms->hgen, 0, sizeof ms->hgen);
        ms->gen = 1;
    }
    ms->nseen = 0;
}

/* P_j of union word c under part j's context: 0.0 if part j lacks it */
static nw_status part_prob(const struct nw_mix *x, struct nw_mix_session *ms, uint32_t c, int j, double *out, nw_error *err) {
    uint32_t id = x->ids[(size_t)c * (size_t)x->P + (size_t)j];
    if (id == NONE) { *out = 0.0; return NW_OK; }
    return nw_q_score(ms->part[j], &ms->cs[j], id, out, err);
}

/* every union word of the prefix, scored: the exact top k when lists of NW_MAX_K fall short */
static nw_status brute_force(const struct nw_mix *x, struct nw_mix_session *ms, int k, nw_error *err) {
    int P = x->P;
    uint32_t clo = NONE, chi = 0;
    for (int j = 0; j < P; j++) {
        if (ms->lo[j] >= ms->hi[j]) continue;
        const nw_model *m = x->part[j];
        uint32_t a = nw_at(&m->ALPH, ms->lo[j]), b = nw_at(&m->ALPH, ms->hi[j] - 1);
        if (a >= m->n || b >= m->n) return nw_fail(err, NW_E_DAMAGED, "%s: damaged model data: alphabetical order", m->path);
        uint32_t ca = x->canon[j][a], cb = x->canon[j][b];
        if (ca < clo) clo = ca;
        if (cb + 1 > chi) chi = cb + 1;
    }
    ms->nbest = 0;
    for (uint32_t c = clo; c < chi; c++) {
        double sum = 0.0;
        for (int j = 0; j < P; j++) {
            double pr;
            nw_status st = part_prob(x, ms, c, j, &pr, err);
            if (st) return st;
            sum += x->w[j] * pr;
        }
        int n = ms->nbest;
        if (n == k && !better(sum, c, ms->best[n - 1].score, ms->best[n - 1].id)) continue;
        int i = n == k ? n - 1 : n;
        while (i > 0 && better(sum, c, ms->best[i - 1].score, ms->best[i - 1].id)) {
            ms->best[i] = ms->best[i - 1];
            i--;
        }
        ms->best[i].score = sum;
        ms->best[i].id = c;
        if (n < k) ms->nbest = n + 1;
    }
    return NW_OK;
}

/* MixedModel._rank_c: the top k (union number, probability) into ms->exact[0 .. min(k, nexact)) */
static nw_status rank_mix(const struct nw_mix *x, struct nw_mix_session *ms, int k, const cand **result, int *n_result,
                          nw_error *err) {
    int P = x->P;
    int want = k > x->depth ? k : x->depth;
    if (want > NW_MAX_K) want = NW_MAX_K;
    nw_status st;
    for (;;) {
        int complete[NW_MAX_PARTS], all_complete = 1;
        double cap[NW_MAX_PARTS], fresh[NW_MAX_PARTS];
        for (int j = 0; j < P; j++) {
            nw_session *ps = ms->part[j];
            if ((st = nw_q_rank(ps, &ms->cs[j], ms->lo[j], ms->hi[j], want, err))) return st;
            complete[j] = ps->nbest < want;
            all_complete &= complete[j];
            cap[j] = complete[j] ? 0.0 : ps->best[ps->nbest - 1].score;
            fresh[j] = complete[j] ? 0.0 : UNKNOWN;
        }
        next_gen(ms);
        for (int j = 0; j < P; j++) {
            const nw_session *ps = ms->part[j];
            for (int i = 0; i < ps->nbest; i++) {
                uint32_t c = x->canon[j][ps->best[i].id];
                ms->row[seen_slot(ms, c, fresh, P)][j] = ps->best[i].score;
            }
        }
        /* _bounds: lower and upper ends of every word met; the k-th best lower end */
        int nk = 0, partial = 0;
        for (int s = 0; s < ms->nseen; s++) {
            double lo = 0.0, hi = 0.0;
            for (int j = 0; j < P; j++) {
                double r = ms->row[s][j];
                if (r == UNKNOWN) {
                    hi += x->w[j] * cap[j];
                    lo += 0.0;
                } else {
                    lo += x->w[j] * r;
                    hi += x->w[j] * r;
                }
            }
            ms->low[s] = lo;
            ms->high[s] = hi;
            int i = nk == k ? k - 1 : nk; /* the k largest lower ends, descending */
            if (nk < k || lo > ms->kth[k - 1]) {
                while (i > 0 && lo > ms->kth[i - 1]) { ms->kth[i] = ms->kth[i - 1]; i--; }
                ms->kth[i] = lo;
                if (nk < k) nk++;
            }
        }
        double kth = ms->nseen >= k ? ms->kth[k - 1] : -1.0;
        ms->nexact = 0;
        for (int s = 0; s < ms->nseen; s++) {
            int known = 1;
            for (int j = 0; j < P; j++) known &= ms->row[s][j] != UNKNOWN;
            uint32_t c = ms->seen_c[s];
            if (known) {
                ms->exact[ms->nexact].score = ms->low[s];
                ms->exact[ms->nexact++].id = c;
                continue;
            }
            partial = 1;
            if (!(ms->high[s] >= kth)) continue; /* cannot enter the top k */
            double tot = 0.0;
            for (int j = 0; j < P; j++) {
                double r = ms->row[s][j];
                if (r == UNKNOWN && (st = part_prob(x, ms, c, j, &r, err))) return st;
                tot += x->w[j] * r;
            }
            ms->exact[ms->nexact].score = tot;
            ms->exact[ms->nexact++].id = c;
        }
        (void)partial;
        qsort(ms->exact, (size_t)ms->nexact, sizeof(cand), cmp_cand);
        if (all_complete) break;
        double bound = 0.0;
        for (int j = 0; j < P; j++) bound += x->w[j] * cap[j];
        if (ms->nexact >= k && ms->exact[k - 1].score > bound) break;
        if (want >= NW_MAX_K) { /* deeper lists than a model's query gives: score every word */
            if ((st = brute_force(x, ms, k, err))) return st;
            *result = ms->best;
            *n_result = ms->nbest;
            return NW_OK;
        }
        want = want * 4 > NW_MAX_K ? NW_MAX_K : want * 4;
    }
    *result = ms->exact;
    *n_result = ms->nexact < k ? ms->nexact : k;
    return NW_OK;
}

nw_status nw_mix_suggest(nw_session *s, const char *text, size_t len, int k, nw_suggestion *out, size_t *n_out,
                         char *buf, size_t buf_size, nw_error *err) {
    const struct nw_mix *x = s->m->mix;
    struct nw_mix_session *ms = s->mix;
    nw_ctx ctx;
    int32_t ncps = 0;
    if (nw_parse_text((const uint8_t *)(text ? text : ""), len, s->cps, &ncps, s->toks, &ctx) != 0)
        return nw_fail(err, NW_E_ARG, "text is not valid UTF-8");
    nw_status st;
    int any = 0;
    for (int j = 0; j < x->P; j++) {
        if ((st = nw_q_prepare(ms->part[j], s->cps, &ctx, &ms->cs[j], &ms->lo[j], &ms->hi[j], err))) return st;
        any |= ms->lo[j] < ms->hi[j];
    }
    if (!any) return NW_OK;
    const cand *top;
    int n;
    if ((st = rank_mix(x, ms, k, &top, &n, err))) return st;
    int at_start = ctx.prev_kind == NW_CTX_BOS;
    int mode = nw_q_recase_mode(s->cps + ctx.prefix_s, ctx.prefix_e - ctx.prefix_s, at_start);
    out_buf o = {buf, buf_size, 0, 0};
    for (int i = 0; i < n; i++) {
        uint32_t c = top[i].id;
        int j = 0;
        uint32_t id = NONE;
        for (int q = 0; q < x->P && id == NONE; q++) { /* the heaviest part that has the word */
            j = x->by_weight[q];
            id = x->ids[(size_t)c * (size_t)x->P + (size_t)j];
        }
        size_t at = o.used;
        if ((st = nw_q_emit(ms->part[j], id, mode, &o, err))) return st;
        out[i].word = buf + at;
        out[i].len = o.used - at - 1;
        out[i].prob = top[i].score;
    }
    *n_out = (size_t)n;
    return NW_OK;
}

nw_status nw_mix_prob(nw_session *s, const char *word, const char *const *history, size_t n_history, double *out,
                      nw_error *err) {
    const struct nw_mix *x = s->m->mix;
    struct nw_mix_session *ms = s->mix;
    double p[NW_MAX_PARTS];
    int has[NW_MAX_PARTS], any = 0;
    int special = word && (strcmp(word, "</s>") == 0 || strcmp(word, "<unk>") == 0);
    for (int j = 0; j < x->P; j++) {
        uint32_t id;
        nw_status st = nw_q_prob(ms->part[j], word, history, n_history, &p[j], &id, err);
        if (st) return st;
        has[j] = special || id < x->part[j]->n;
        any |= has[j];
    }
    /* a word no part has is <unk> in every part (each part already answered <unk>'s probability) */
    double sum = 0.0;
    for (int j = 0; j < x->P; j++) sum += x->w[j] * (any && !has[j] ? 0.0 : p[j]);
    *out = sum;
    return NW_OK;
}
