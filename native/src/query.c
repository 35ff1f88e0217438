/* Queries: suggest (Model.suggest) and prob (Model.prob_after), docs/FORMAT.md §9.
 *
 * One scorer serves every file kind: P(w | u v) = α₃ + γ₃·(α₂ + γ₂·P₁(w)) (§9.7), which for
 * a Jelinek-Mercer bigram is λ·c(v,w)/c(v) + (1−λ)·c(w)/N in the same floating-point
 * operations as nextword/model.py (`lam * (c / cv) + (1 - lam) * u`), so the answers are
 * the Python library's to the last bit. Build with -ffp-contract=off: a fused multiply-add
 * would round differently.
 *
 * Top k: the exact answer lies among the k words of the prefix range with the highest
 * floor (TOPK), the bigram successors of v in the range (the stored skyband of a long
 * segment) and the trigram successors of (u, v) in the range (its stored skyband); each
 * candidate is scored in full and kept in a k-best list by (score descending, id
 * ascending). Every value read from the bigram- and trigram-sized sections (not
 * checksummed on open) is bounds-checked here; a bad one gives NW_E_DAMAGED.
 */
#include <stdlib.h>
#include <string.h>

#include "internal.h"
#include "query.h"
#include "text.h"

#define TOPK_FANOUT 64
#define CTX_BLOCK 16
#define SUMMARY_MIN 32

nw_status nw_q_session_new(const nw_model *m, nw_session **out, nw_error *err) {
    if (!m || !out) return nw_fail(err, NW_E_ARG, "model and out must not be NULL");
    nw_session *s = (nw_session *)calloc(1, sizeof *s);
    if (!s) return nw_fail(err, NW_E_NOMEM, "out of memory");
    s->m = m;
    s->cursor = nw_cursor_new();
    if (!s->cursor) {
        free(s);
        return nw_fail(err, NW_E_NOMEM, "out of memory");
    }
    *out = s;
    return NW_OK;
}

void nw_q_session_free(nw_session *s) {
    if (!s) return;
    nw_mix_session_free(s->mix);
    nw_cursor_free(s->cursor);
    free(s);
}

nw_status nw_session_new(const nw_model *m, nw_session **out, nw_error *err) {
    nw_status st = nw_q_session_new(m, out, err);
    if (st || !m->mix) return st;
    if ((st = nw_mix_session_new(m, *out, err))) {
        nw_q_session_free(*out);
        *out = NULL;
    }
    return st;
}

void nw_session_free(nw_session *s) { nw_q_session_free(s); }

#define DAMAGED(...) nw_fail(err, NW_E_DAMAGED, __VA_ARGS__)

/* -- ids ------------------------------------------------------------------------------- */

static size_t encode_cps(const int32_t *c, long n, uint8_t *out) {
    size_t k = 0;
    for (long i = 0; i < n; i++) k += nw_utf8_encode((uint32_t)c[i], out + k);
    return k;
}

/* word id of the key in s->key, or n+1 (<unk>) */
static nw_status id_of_key(nw_session *s, uint32_t *id, nw_error *err) {
    const nw_model *m = s->m;
    long long kid = nw_trie_lookup(m->trie, s->cursor, (const char *)s->key, s->key_len);
    if (kid == -2) return DAMAGED("damaged model data: trie lookup failed");
    *id = kid < 0 ? m->n + 1 : nw_at(&m->TKID, (uint64_t)kid);
    return NW_OK;
}

static nw_status fold_to_key(nw_session *s, long n, nw_error *err) {
    if (n == -1) return nw_fail(err, NW_E_ARG, "text is not valid UTF-8");
    if (n == -2) return nw_fail(err, NW_E_ARG, "word too long (its key exceeds %d code points)", FOLD_CAP);
    s->key_len = encode_cps(s->fold, n, s->key);
    return NW_OK;
}

static nw_status word_id_cps(nw_session *s, const int32_t *cps, int32_t a, int32_t b, uint32_t *id, nw_error *err) {
    nw_status st = fold_to_key(s, nw_fold_cps(cps + a, (size_t)(b - a), s->fold, FOLD_CAP), err);
    return st ? st : id_of_key(s, id, err);
}

/* -- the successor lists, in either layout ------------------------------------------------
 *
 * Every read of SUCC, TSUC, TCTB/TLEN and HN13 goes through these: plain arrays in files
 * 1.0-1.5, chunked Elias-Fano sequences in 1.6 (§7.18). ROWS, IDTK and APOS are arrays in
 * both (made on open for 1.6). Each returns -1 when a decoded value breaks the format
 * (the caller answers NW_E_DAMAGED): a chunk that does not decode, a position ≥ n+2 or
 * outside its row, a remapped trigram successor past its row. */

#define NONE UINT64_MAX
#define SCAN_MIN 12 /* consecutive entries from which a 1.6 scan decodes whole chunks */
#define ABSENT (UINT64_MAX - 1) /* a bigram entry known not to exist */

/* One decoded chunk of a sequence, for a scan of consecutive entries (a chunk decoded at
 * once costs about what a few reads by position cost; on the stack, per scan). */
typedef struct ef_scan {
    const nw_ef *e;
    uint64_t chunk; /* NONE: nothing decoded yet */
    int m;
    uint64_t vals[NW_EF_CHUNK];
} ef_scan;

/* Y_j of the scan's sequence, through its decoded chunk */
static int scan_at(ef_scan *sc, uint64_t j, uint64_t *y) {
    uint64_t c = j / NW_EF_CHUNK, k = j % NW_EF_CHUNK;
    if (c != sc->chunk) {
        sc->chunk = NONE;
        if (nw_ef_chunk(sc->e, c, sc->vals, &sc->m)) return -1;
        sc->chunk = c;
    }
    if (k >= (uint64_t)sc->m) return -1;
    *y = sc->vals[k];
    return 0;
}

/* The values of a scan's consecutive n-grams, read NW_RUN_MAX at a time (codec.run). */
typedef struct value_run {
    uint64_t s, e; /* the n-grams in vals (NONE: none yet) */
    uint64_t vals[NW_RUN_MAX];
} value_run;

/* value of n-gram i (< end, the scan's end) through the run that holds it */
static int run_value(const nw_model *m, const nw_level_values *lv, value_run *vr, uint64_t i, uint64_t end, uint64_t *out) {
    if (vr->s == NONE || i < vr->s || i >= vr->e) {
        uint64_t e = end - i > NW_RUN_MAX ? i + NW_RUN_MAX : end;
        vr->s = NONE;
        if (e <= i || m->codec->run(lv, i, e, vr->vals)) return -1;
        vr->s = i;
        vr->e = e;
    }
    *out = vr->vals[i - vr->s];
    return 0;
}

/* position of SEF value y in row v (§7.18: y − v·(n+2), which must be below n+2) */
static int succ_of(const nw_model *m, uint32_t v, uint64_t y, uint32_t *pos) {
    uint64_t npos = (uint64_t)m->n + 2, base = (uint64_t)v * npos;
    if (y < base || y - base >= npos) return -1;
    *pos = (uint32_t)(y - base);
    return 0;
}

/* alphabetical position of bigram entry i of row v (sc: a scan of consecutive entries, or NULL) */
static int succ_pos(const nw_model *m, uint32_t v, uint64_t i, uint32_t *pos, ef_scan *sc) {
    if (!m->ef) { *pos = nw_at(&m->SUCC, i); return 0; }
    uint64_t y;
    if (sc ? scan_at(sc, i, &y) : nw_ef_get(&m->sef, i, &y)) return -1;
    return succ_of(m, v, y, pos);
}

/* the first entry in [a, re) of row v whose position is ≥ pos (re if none); *hit: it is pos */
static int succ_lower(const nw_model *m, uint32_t v, uint64_t a, uint64_t re, uint64_t pos, uint64_t *at, int *hit) {
    *hit = 0;
    if (!m->ef) {
        *at = nw_lower(&m->SUCC, a, re, (uint32_t)pos);
        *hit = *at < re && nw_at(&m->SUCC, *at) == pos;
        return 0;
    }
    uint64_t y = (uint64_t)v * ((uint64_t)m->n + 2) + pos, val = 0;
    if (nw_ef_lower(&m->sef, y, a, re, at, &val)) return -1;
    *hit = *at < re && val == y;
    return 0;
}

/* the trigram entries [s, e) of the context at bigram entry i (s == e: not a context), and
 * (1.6) the base B_i of its remapped successors */
static int tri_range(const nw_model *m, uint64_t i, uint64_t *s, uint64_t *e, uint64_t *base) {
    *base = 0;
    if (m->ef) {
        uint64_t y = 0;
        if (nw_ef_get(&m->tpt, i, s) || nw_ef_get(&m->tpt, i + 1, e)) return -1;
        if (*s >= *e) return *s > *e ? -1 : 0;
        if (*e > m->t) return -1;
        if (*s && nw_ef_get(&m->tef, *s - 1, &y)) return -1;
        *base = *s ? y + 1 : 0;
        return *base == 0 && *s ? -1 : 0; /* y + 1 wrapped */
    }
    uint64_t len;
    if (nw_codec_exact.value(&m->tlen, i, &len)) return -1;
    *s = *e = 0;
    if (len == 0) return 0;
    uint64_t b0 = i - i % CTX_BLOCK, start = nw_at(&m->TCTB, i / CTX_BLOCK);
    for (uint64_t q = b0; q < i; q++) {
        uint64_t l;
        if (nw_codec_exact.value(&m->tlen, q, &l)) return -1;
        start += l;
    }
    *s = start;
    *e = start + len;
    return 0;
}

/* alphabetical position of trigram entry j of context cs (1.6: bigram entry *bi of row v
 * holds it; 1.4/1.5: *bi = NONE); sc: a scan of consecutive entries, or NULL */
static int tri_pos(const nw_model *m, const cstate *cs, uint64_t j, uint32_t *pos, uint64_t *bi, ef_scan *sc) {
    *bi = NONE;
    if (!m->ef) { *pos = nw_at(&m->TSUC, j); return 0; }
    uint64_t y, rs = nw_at(&m->ROWS, cs->v), re = nw_at(&m->ROWS, cs->v + 1);
    if ((sc ? scan_at(sc, j, &y) : nw_ef_get(&m->tef, j, &y)) || y < cs->tb || y - cs->tb >= re - rs) return -1;
    *bi = rs + (y - cs->tb);
    return succ_pos(m, cs->v, *bi, pos, NULL);
}

/* the first trigram entry in [a, cs->e3) whose position is ≥ pos; *hit: it is pos. bi: the
 * bigram entry of (v, w) when the caller knows it (1.6), else NONE */
static int tri_lower(const nw_model *m, const cstate *cs, uint64_t a, uint64_t pos, uint64_t bi, uint64_t *at, int *hit) {
    *hit = 0;
    if (!m->ef) {
        *at = nw_lower(&m->TSUC, a, cs->e3, (uint32_t)pos);
        *hit = *at < cs->e3 && nw_at(&m->TSUC, *at) == pos;
        return 0;
    }
    uint64_t rs = nw_at(&m->ROWS, cs->v), re = nw_at(&m->ROWS, cs->v + 1), x, val = 0;
    int in_row = 1;
    if (bi == NONE && succ_lower(m, cs->v, rs, re, pos, &bi, &in_row)) return -1;
    x = bi - rs; /* the row-v index of pos, or of the first position after it */
    if (x > UINT64_MAX - cs->tb) return -1;
    if (nw_ef_lower(&m->tef, cs->tb + x, a, cs->e3, at, &val)) return -1;
    *hit = in_row && *at < cs->e3 && val == cs->tb + x;
    return 0;
}

/* the dropped mass of the trigram context at bigram entry i (0 if none): TDRI/TDRV, or (1.6)
 * TDI and the prefix sums TDV, the mass checked ≥ 1 and within 32 bits */
static int tri_dropped(const nw_model *m, uint64_t i, uint64_t *mass) {
    *mass = 0;
    if (!m->ef) {
        uint64_t j = nw_lower(&m->TDRI, 0, m->TDRI.n, (uint32_t)i);
        if (j < m->TDRI.n && nw_at(&m->TDRI, j) == i) *mass = nw_at(&m->TDRV, j);
        return 0;
    }
    uint64_t j, y = 0, a, b;
    if (nw_ef_lower(&m->tdi, i, 0, m->tdi.n, &j, &y)) return -1;
    if (j >= m->tdi.n || y != i) return 0;
    if (nw_ef_get(&m->tdv, j, &a) || nw_ef_get(&m->tdv, j + 1, &b) || b <= a || b - a > 0xFFFFFFFFu) return -1;
    *mass = b - a;
    return 0;
}

/* -- values ------------------------------------------------------------------------------ */

static int row_value(const nw_model *m, uint64_t i, uint64_t *c) { return m->codec->value(&m->v2, i, c); }

/* c(v, w) by binary search of w's position in row v (0 if absent); *bi: its entry, or ABSENT */
static nw_status pair_count(const nw_model *m, uint32_t v, uint32_t pos, uint64_t *c, uint64_t *bi, nw_error *err) {
    uint64_t rs = nw_at(&m->ROWS, v), re = nw_at(&m->ROWS, v + 1), i;
    int hit;
    *c = 0;
    *bi = ABSENT;
    if (succ_lower(m, v, rs, re, pos, &i, &hit))
        return DAMAGED("%s: damaged model data: the successor list of row %u does not decode", m->path, v);
    if (!hit) return NW_OK;
    *bi = i;
    if (row_value(m, i, c)) return DAMAGED("%s: escaped count without a value at entry %llu", m->path, (unsigned long long)i);
    return NW_OK;
}

static uint64_t sparse(const nw_arr *idx, const nw_arr *val, uint64_t i) {
    uint64_t j = nw_lower(idx, 0, idx->n, (uint32_t)i);
    return j < idx->n && nw_at(idx, j) == i ? nw_at(val, j) : 0;
}

static double lam_of(const nw_model *m, uint64_t cv) {
    if (m->n_bounds < 0) return m->lam;
    int i = 0; /* bisect_right(bounds, cv) */
    while (i < m->n_bounds && m->bounds[i] <= cv) i++;
    return m->lambdas[i];
}

static inline double kn_alpha(uint64_t c, uint64_t tot, const double *d) {
    double disc = c == 0 ? 0.0 : c < 2 ? d[0] : c < 3 ? d[1] : d[2];
    double x = (double)c - disc;
    return (x > 0.0 ? x : 0.0) / (double)tot;
}

static inline double alpha(const nw_model *m, int order, uint64_t c, uint64_t tot, double lam) {
    if (m->kn) return kn_alpha(c, tot, m->d[order == 3 && m->order == 3 ? 2 : 1]);
    return lam * ((double)c / (double)tot);
}

/* the bigram entry of trigram context (u, v), or 0 if none; fills s3/e3/tot3/g3 */
static nw_status level3(const nw_model *m, uint32_t u, uint32_t v, cstate *cs, nw_error *err) {
    cs->has3 = 0;
    uint64_t rs = nw_at(&m->ROWS, u), re = nw_at(&m->ROWS, u + 1), i, start, end, base;
    uint32_t pos = nw_at(&m->APOS, v);
    int hit;
    if (succ_lower(m, u, rs, re, pos, &i, &hit))
        return DAMAGED("%s: damaged model data: the successor list of row %u does not decode", m->path, u);
    if (!hit) return NW_OK;
    if (tri_range(m, i, &start, &end, &base))
        return DAMAGED("%s: damaged model data: the trigram entries of context %llu do not decode", m->path, (unsigned long long)i);
    if (start == end) return NW_OK;
    if (!(start < end && end <= m->t))
        return DAMAGED("%s: damaged model data: trigram context %llu has entries [%llu, %llu)", m->path,
                       (unsigned long long)i, (unsigned long long)start, (unsigned long long)end);
    uint64_t sm = 0, n1 = 0, n2 = 0, n3 = 0;
    if (end - start > SUMMARY_MIN) {
        uint64_t j = nw_lower(&m->TLNI, 0, m->TLNI.n, (uint32_t)i);
        if (j >= m->TLNI.n || nw_at(&m->TLNI, j) != i)
            return DAMAGED("%s: damaged model data: trigram context %llu has no stored summary", m->path, (unsigned long long)i);
        sm = nw_at(&m->TLNV, 4 * j);
        n1 = nw_at(&m->TLNV, 4 * j + 1);
        n2 = nw_at(&m->TLNV, 4 * j + 2);
        n3 = nw_at(&m->TLNV, 4 * j + 3);
        if (n1 + n2 + n3 != end - start || sm < end - start)
            return DAMAGED("%s: damaged model data: trigram context %llu has a summary that does not fit its row", m->path,
                           (unsigned long long)i);
    } else {
        uint64_t vals[NW_RUN_MAX]; /* at most SUMMARY_MIN values: one run */
        if (m->codec->run(&m->v3, start, end, vals))
            return DAMAGED("%s: damaged model data: the values of trigram context %llu do not decode", m->path, (unsigned long long)i);
        for (uint64_t q = 0; q < end - start; q++) {
            uint64_t x = vals[q];
            sm += x;
            n1 += x == 1;
            n2 += x == 2;
        }
        n3 = (end - start) - n1 - n2;
    }
    uint64_t dropped;
    if (tri_dropped(m, i, &dropped))
        return DAMAGED("%s: damaged model data: the dropped mass of trigram context %llu does not decode", m->path, (unsigned long long)i);
    uint64_t tot = sm + dropped;
    if (tot == 0) return DAMAGED("%s: damaged model data: trigram context %llu has a total of 0", m->path, (unsigned long long)i);
    cs->has3 = 1;
    cs->s3 = start;
    cs->e3 = end;
    cs->tb = base;
    cs->tot3 = tot;
    if (m->kn) {
        const double *d = m->d[2];
        cs->g3 = ((double)(tot - sm) + d[0] * (double)n1 + d[1] * (double)n2 + d[2] * (double)n3) / (double)tot;
    } else {
        cs->g3 = (1.0 - cs->lam3) + cs->lam3 * ((double)(tot - sm) / (double)tot);
    }
    return NW_OK;
}

/* the context state of ids (one or two; the last is v) */
static nw_status context(const nw_model *m, const uint32_t *ids, int nids, cstate *cs, nw_error *err) {
    uint32_t v = ids[nids - 1];
    memset(cs, 0, sizeof *cs);
    cs->v = v;
    cs->g2 = 1.0;
    cs->g3 = 1.0;
    uint64_t tot = nw_hist(m, v);
    if (m->jm_path) cs->lam2 = lam_of(m, tot);
    else cs->lam2 = m->lam;
    cs->lam3 = m->order == 3 && !m->kn ? m->lam3 : cs->lam2;
    if (tot > 0) {
        uint64_t dropped = m->minor >= 3 ? sparse(&m->HDRI, &m->HDRV, v) : 0;
        if (dropped > tot)
            return DAMAGED("%s: damaged model data: dropped mass %llu above its context total %llu", m->path,
                           (unsigned long long)dropped, (unsigned long long)tot);
        cs->tot2 = tot;
        if (m->kn) {
            const double *d = m->d[1];
            /* HN13: stored (1.4/1.5) or made on open from N1/N2's prefix sums (1.6) */
            uint64_t n1 = nw_at(&m->HN13, 3 * (uint64_t)v), n2 = nw_at(&m->HN13, 3 * (uint64_t)v + 1);
            uint64_t n3 = nw_at(&m->HN13, 3 * (uint64_t)v + 2);
            cs->g2 = ((double)dropped + d[0] * (double)n1 + d[1] * (double)n2 + d[2] * (double)n3) / (double)tot;
        } else {
            cs->g2 = (1.0 - cs->lam2) + cs->lam2 * ((double)dropped / (double)tot);
        }
    }
    if (m->order == 3 && nids == 2) return level3(m, ids[0], v, cs, err);
    return NW_OK;
}

/* full score of word id w at position pos; c2/c3 given when known (else NONE), bi the bigram
 * entry of (v, w) when c2 is given (ABSENT: none; NONE: not known) */
static nw_status score(const nw_model *m, const cstate *cs, uint32_t w, uint32_t pos, uint64_t c2, uint64_t bi, uint64_t c3,
                       double *out, nw_error *err) {
    double p = m->floor[w];
    nw_status st;
    if (cs->tot2 > 0) {
        if (c2 == NONE && (st = pair_count(m, cs->v, pos, &c2, &bi, err))) return st;
        if (c2 > cs->tot2)
            return DAMAGED("%s: damaged model data: pair count %llu above its history count %llu", m->path,
                           (unsigned long long)c2, (unsigned long long)cs->tot2);
        p = alpha(m, 2, c2, cs->tot2, cs->lam2) + cs->g2 * p;
    }
    if (cs->has3) {
        if (c3 == NONE) {
            uint64_t i;
            int hit = 0;
            c3 = 0;
            /* 1.6: a trigram (u, v, w) is stored as its suffix bigram's entry, so none without it */
            if (!(m->ef && bi == ABSENT) && tri_lower(m, cs, cs->s3, pos, bi, &i, &hit))
                return DAMAGED("%s: damaged model data: the trigram successors of a context do not decode", m->path);
            if (hit && m->codec->value(&m->v3, i, &c3))
                return DAMAGED("%s: escaped value without an entry at n-gram %llu", m->path, (unsigned long long)i);
        }
        if (c3 > cs->tot3)
            return DAMAGED("%s: damaged model data: trigram value %llu above its context total %llu", m->path,
                           (unsigned long long)c3, (unsigned long long)cs->tot3);
        p = alpha(m, 3, c3, cs->tot3, cs->lam3) + cs->g3 * p;
    }
    if (!(p >= 0.0 && p <= 1.0 + 1e-9)) return DAMAGED("%s: damaged model data: a probability of %g", m->path, p);
    *out = p;
    return NW_OK;
}

/* -- the k best ------------------------------------------------------------------------ */

static void offer(nw_session *s, double sc, uint32_t id) {
    cand *b = s->best;
    int n = s->nbest;
    if (n == s->k && !(sc > b[n - 1].score || (sc == b[n - 1].score && id < b[n - 1].id))) return;
    for (int i = 0; i < n; i++)
        if (b[i].id == id) return; /* the same word again: the same exact score */
    int i = n == s->k ? n - 1 : n;
    while (i > 0 && (sc > b[i - 1].score || (sc == b[i - 1].score && id < b[i - 1].id))) {
        b[i] = b[i - 1];
        i--;
    }
    b[i].score = sc;
    b[i].id = id;
    if (n < s->k) s->nbest = n + 1;
}

/* the k smallest word ids among positions [lo, hi) (candidates.PrefixRange.top_ids) */
static void top_insert(nw_session *s, uint32_t id) {
    const nw_model *m = s->m;
    if (id >= m->n) return; /* padding */
    int n = s->ntop;
    if (n == s->k && id >= s->top[n - 1]) return;
    int i = n == s->k ? n - 1 : n;
    while (i > 0 && s->top[i - 1] > id) {
        s->top[i] = s->top[i - 1];
        i--;
    }
    s->top[i] = id;
    if (n < s->k) s->ntop = n + 1;
}

static void units(nw_session *s, int level, uint64_t i, uint64_t j) {
    const nw_model *m = s->m;
    if (level == 0) {
        for (uint64_t x = i; x < j; x++) top_insert(s, nw_at(&m->ALPH, x));
        return;
    }
    for (uint64_t blk = i; blk < j; blk++) {
        uint64_t base = (m->level_off[level - 1] + blk * TOPK_FANOUT);
        for (int q = 0; q < s->k; q++) top_insert(s, nw_at(&m->TOPK, base + (uint64_t)q));
    }
}

static void top_ids(nw_session *s, uint64_t lo, uint64_t hi) {
    const nw_model *m = s->m;
    s->ntop = 0;
    if (lo == 0 && hi == m->n) {
        for (uint32_t i = 0; i < (uint32_t)s->k && i < hi; i++) s->top[s->ntop++] = i;
        return;
    }
    if (hi - lo <= 2 * TOPK_FANOUT) {
        units(s, 0, lo, hi);
        return;
    }
    uint64_t unit = 1, a = lo, b = hi;
    int level = 0;
    for (;;) {
        uint64_t nxt = unit * TOPK_FANOUT;
        uint64_t A = (a + nxt - 1) / nxt * nxt, B = b / nxt * nxt;
        if (level == m->n_levels || A >= B) {
            units(s, level, a / unit, b / unit);
            return;
        }
        units(s, level, a / unit, A / unit);
        units(s, level, B / unit, b / unit);
        a = A;
        b = B;
        unit = nxt;
        level++;
    }
}

/* entries of segment [s, e) with fewer than k dominators, if its skyband is stored */
static nw_status band(const nw_model *m, const nw_arr *segs, const nw_arr *sege, const nw_arr *skyp, const nw_arr *skyi,
                      const nw_arr *skyc, uint64_t s, uint64_t e, int k, uint64_t *from, uint64_t *to, int *found,
                      nw_error *err) {
    *found = 0;
    uint64_t i = nw_lower(segs, 0, segs->n, (uint32_t)s);
    for (; i < segs->n && nw_at(segs, i) == s; i++) {
        if (nw_at(sege, i) != e) continue;
        uint64_t start = nw_at(skyp, i), stop = nw_at(skyp, i + 1);
        uint64_t want = start + nw_at(skyc, i * m->sky_k + (uint64_t)k - 1);
        if (want < stop) stop = want;
        if (start > stop || stop > skyi->n)
            return DAMAGED("%s: damaged model data: skyband %llu runs outside its table", m->path, (unsigned long long)i);
        *from = start;
        *to = stop;
        *found = 1;
        return NW_OK;
    }
    return NW_OK;
}

static nw_status rank(nw_session *s, const cstate *cs, uint64_t lo, uint64_t hi, nw_error *err) {
    const nw_model *m = s->m;
    int k = s->k;
    nw_status st;
    double sc;
    s->nbest = 0;
    /* (a) the k words of the range with the highest floor */
    top_ids(s, lo, hi);
    for (int i = 0; i < s->ntop; i++) {
        uint32_t w = s->top[i];
        if ((st = score(m, cs, w, nw_at(&m->APOS, w), NONE, NONE, NONE, &sc, err))) return st;
        offer(s, sc, w);
    }
    /* (b) the bigram successors of v in the range, or their stored skyband */
    if (cs->tot2 > 0) {
        uint64_t rs = nw_at(&m->ROWS, cs->v), re = nw_at(&m->ROWS, cs->v + 1), a, b;
        int hit;
        if (succ_lower(m, cs->v, rs, re, lo, &a, &hit) || succ_lower(m, cs->v, a, re, hi, &b, &hit))
            return DAMAGED("%s: damaged model data: the successor list of row %u does not decode", m->path, cs->v);
        uint64_t from = 0, to = 0;
        int found = 0;
        if (b - a > m->sky_min && (uint32_t)k <= m->sky_k &&
            (st = band(m, &m->SEGS, &m->SEGE, &m->SKYP, &m->SKYI, &m->SKYC, a, b, k, &from, &to, &found, err)))
            return st;
        if (found && from == to) found = 0; /* an empty band: scan (Model._rank) */
        uint64_t count = found ? to - from : b - a;
        ef_scan scan = {&m->sef, NONE, 0, {0}}; /* 1.6: the entries [a, b) in order (no band) */
        ef_scan *scp = found || count < SCAN_MIN ? NULL : &scan;
        value_run vr = {NONE, NONE, {0}};
        for (uint64_t x = 0; x < count; x++) {
            uint64_t i = a + x;
            if (found) {
                uint64_t off = nw_at(&m->SKYI, from + x);
                if (off >= b - a) return DAMAGED("%s: damaged model data: skyband points outside its segment", m->path);
                i = a + off;
            }
            uint32_t pos;
            if (succ_pos(m, cs->v, i, &pos, scp))
                return DAMAGED("%s: damaged model data: the successor list of row %u does not decode", m->path, cs->v);
            if (pos < lo || pos >= hi) return DAMAGED("%s: damaged model data: successor position %u out of order", m->path, pos);
            uint64_t c2;
            if (scp ? run_value(m, &m->v2, &vr, i, b, &c2) : row_value(m, i, &c2))
                return DAMAGED("%s: escaped count without a value at entry %llu", m->path, (unsigned long long)i);
            uint32_t w = nw_at(&m->ALPH, pos);
            if ((st = score(m, cs, w, pos, c2, i, NONE, &sc, err))) return st;
            offer(s, sc, w);
        }
    }
    /* (c) the trigram successors of (u, v) in the range, or their stored skyband */
    if (cs->has3) {
        uint64_t a, b;
        int hit;
        if (tri_lower(m, cs, cs->s3, lo, NONE, &a, &hit) || tri_lower(m, cs, a, hi, NONE, &b, &hit))
            return DAMAGED("%s: damaged model data: the trigram successors of a context do not decode", m->path);
        uint64_t from = 0, to = 0;
        int found = 0;
        if (b - a > m->tsky_min && (uint32_t)k <= m->sky_k && (m->kn || cs->lam3 > 0.0) &&
            (st = band(m, &m->TSGS, &m->TSGE, &m->TSKP, &m->TSKI, &m->TSKC, a, b, k, &from, &to, &found, err)))
            return st;
        uint64_t count = found ? to - from : b - a;
        ef_scan scan = {&m->tef, NONE, 0, {0}};
        ef_scan *scp = found || count < SCAN_MIN ? NULL : &scan;
        value_run vr = {NONE, NONE, {0}};
        for (uint64_t x = 0; x < count; x++) {
            uint64_t i = a + x;
            if (found) {
                uint64_t off = nw_at(&m->TSKI, from + x);
                if (off >= b - a) return DAMAGED("%s: damaged model data: trigram skyband points outside its segment", m->path);
                i = a + off;
            }
            uint32_t pos;
            uint64_t bi, c2 = NONE;
            if (tri_pos(m, cs, i, &pos, &bi, scp))
                return DAMAGED("%s: damaged model data: the trigram successors of a context do not decode", m->path);
            if (pos < lo || pos >= hi) return DAMAGED("%s: damaged model data: trigram successor %u out of order", m->path, pos);
            uint64_t c3;
            if (scp ? run_value(m, &m->v3, &vr, i, b, &c3) : m->codec->value(&m->v3, i, &c3))
                return DAMAGED("%s: escaped value without an entry at n-gram %llu", m->path, (unsigned long long)i);
            /* 1.6: the successor is read through its bigram entry (v, w), which holds c(v, w) */
            if (bi != NONE && cs->tot2 > 0 && row_value(m, bi, &c2))
                return DAMAGED("%s: escaped count without a value at entry %llu", m->path, (unsigned long long)bi);
            uint32_t w = nw_at(&m->ALPH, pos);
            if ((st = score(m, cs, w, pos, c2, bi, c3, &sc, err))) return st;
            offer(s, sc, w);
        }
    }
    return NW_OK;
}

/* -- prefix range (§9.4) ---------------------------------------------------------------- */

static uint32_t head(const uint8_t *q, size_t n, uint8_t pad) {
    uint32_t x = 0;
    for (size_t i = 0; i < 4; i++) x = (x << 8) | (i < n ? q[i] : pad);
    return x;
}

/* compare the first `ncp` code points of key (UTF-8) with q (UTF-8): <0, 0, >0 */
static int cmp_prefix(const char *key, size_t klen, long ncp, const uint8_t *q, size_t qlen) {
    size_t i = 0;
    long c = 0;
    while (i < klen && c < ncp) {
        uint8_t b = (uint8_t)key[i];
        i += b < 0x80 ? 1 : b < 0xE0 ? 2 : b < 0xF0 ? 3 : 4;
        c++;
    }
    if (i > klen) i = klen;
    size_t n = i < qlen ? i : qlen;
    int r = memcmp(key, q, n);
    if (r) return r;
    return i < qlen ? -1 : i > qlen ? 1 : 0;
}

static nw_status prefix_range(nw_session *s, long ncp, uint64_t *lo_out, uint64_t *hi_out, nw_error *err) {
    const nw_model *m = s->m;
    uint64_t n = m->n;
    if (ncp == 0) { *lo_out = 0; *hi_out = n; return NW_OK; }
    if ((uint64_t)ncp > m->max_key) { *lo_out = *hi_out = 0; return NW_OK; }
    const uint8_t *q = s->key;
    size_t qlen = s->key_len;
    uint32_t h0 = head(q, qlen, 0x00), h1 = head(q, qlen, 0xFF);
    uint64_t lo = nw_lower(&m->KEY4, 0, n, h0), hi = lo, top = n;
    while (hi < top) { /* bisect_right(KEY4, h1, lo, n) */
        uint64_t mid = hi + (top - hi) / 2;
        if (nw_at(&m->KEY4, mid) <= h1) hi = mid + 1; else top = mid;
    }
    if (qlen > 4 && lo < hi) {
        uint64_t a = lo, b = hi;
        while (a < b) { /* first p with key(p)[:ncp] >= q */
            uint64_t mid = a + (b - a) / 2;
            const char *key;
            size_t klen;
            if (nw_trie_restore(m->trie, s->cursor, nw_at(&m->IDTK, nw_at(&m->ALPH, mid)), &key, &klen))
                return DAMAGED("%s: damaged model data: trie reverse lookup failed", m->path);
            if (cmp_prefix(key, klen, ncp, q, qlen) < 0) a = mid + 1; else b = mid;
        }
        uint64_t c = a, d = hi;
        while (c < d) { /* first p with key(p)[:ncp] > q */
            uint64_t mid = c + (d - c) / 2;
            const char *key;
            size_t klen;
            if (nw_trie_restore(m->trie, s->cursor, nw_at(&m->IDTK, nw_at(&m->ALPH, mid)), &key, &klen))
                return DAMAGED("%s: damaged model data: trie reverse lookup failed", m->path);
            if (cmp_prefix(key, klen, ncp, q, qlen) <= 0) c = mid + 1; else d = mid;
        }
        lo = a;
        hi = c;
    }
    *lo_out = lo;
    *hi_out = hi;
    return NW_OK;
}

/* -- output: display spelling (§7.10), recased (text.recase) ----------------------------- */


static void put_cp(out_buf *o, uint32_t cp) {
    uint8_t tmp[4];
    size_t k = nw_utf8_encode(cp, tmp);
    if (o->used + k + 1 > o->cap) { o->overflow = 1; return; }
    memcpy(o->p + o->used, tmp, k);
    o->used += k;
}

/* mode 0: as stored, 1: first letter upper, 2: all upper */
nw_status nw_q_emit(nw_session *s, uint32_t w, int mode, out_buf *o, nw_error *err) {
    const nw_model *m = s->m;
    const uint8_t *p;
    size_t len;
    uint64_t j = nw_lower(&m->DISI, 0, m->DISI.n, w);
    if (j < m->DISI.n && nw_at(&m->DISI, j) == w) {
        uint64_t a = nw_at(&m->DISO, j), b = nw_at(&m->DISO, j + 1);
        p = m->disb + a;
        len = (size_t)(b - a);
    } else {
        const char *key;
        if (nw_trie_restore(m->trie, s->cursor, nw_at(&m->IDTK, w), &key, &len))
            return DAMAGED("%s: damaged model data: trie reverse lookup failed", m->path);
        p = (const uint8_t *)key;
    }
    size_t i = 0;
    int first = 1;
    while (i < len) {
        uint32_t cp;
        size_t k = nw_utf8_decode(p + i, len - i, &cp);
        if (k == 0) return DAMAGED("%s: damaged model data: a display spelling is not UTF-8", m->path);
        i += k;
        if (mode == 2 || (mode == 1 && first)) {
            uint32_t up[3];
            int nu = nw_char_upper(cp, up);
            for (int q = 0; q < nu; q++) put_cp(o, up[q]);
        } else {
            put_cp(o, cp);
        }
        first = 0;
    }
    if (o->overflow) return nw_fail(err, NW_E_BUFFER, "the text buffer of %zu bytes is too small", o->cap);
    o->p[o->used++] = 0;
    return NW_OK;
}

int nw_q_recase_mode(const int32_t *prefix, int32_t n, int at_start) {
    if (n > 0) {
        uint32_t first = (uint32_t)prefix[0];
        if (nw_is_lower(first)) return 0;
        int cased = 0, upper = 0, isupper = 1;
        for (int32_t i = 0; i < n; i++) { /* str.isupper */
            uint32_t c = (uint32_t)prefix[i];
            if (nw_is_lower(c) || nw_is_title(c)) { isupper = 0; break; }
            if (nw_is_upper(c)) { cased = 1; upper++; }
        }
        if (isupper && cased) {
            upper = 0;
            for (int32_t i = 0; i < n; i++) upper += nw_is_upper((uint32_t)prefix[i]);
            if (upper >= 2) return 2;
        }
        if (nw_is_upper(first)) return 1;
    }
    return at_start ? 1 : 0;
}

/* -- the API ------------------------------------------------------------------------------ */

nw_status nw_q_prepare(nw_session *s, const int32_t *cps, const nw_ctx *ctx, cstate *cs, uint64_t *lo, uint64_t *hi,
                       nw_error *err) {
    const nw_model *m = s->m;
    /* context ids: (before, previous) or (<s>), cut at the last sentence start */
    uint32_t ids[2];
    int nids = 0;
    nw_status st;
    uint32_t bos = m->n + 2, unk = m->n + 1;
    if (ctx->prev_kind == NW_CTX_BOS) {
        ids[nids++] = bos;
    } else {
        int kinds[2] = {ctx->before_kind, ctx->prev_kind};
        int32_t ss[2] = {ctx->before_s, ctx->prev_s}, ee[2] = {ctx->before_e, ctx->prev_e};
        for (int q = 0; q < 2; q++) {
            uint32_t id = 0;
            if (kinds[q] == NW_CTX_BOS) id = bos;
            else if (kinds[q] == NW_CTX_UNK) id = unk;
            else if ((st = word_id_cps(s, cps, ss[q], ee[q], &id, err))) return st;
            ids[nids++] = id;
        }
    }
    const uint32_t *cids = ids;
    int ncids = nids;
    if (m->order == 2) { cids = ids + nids - 1; ncids = 1; }
    if ((st = context(m, cids, ncids, cs, err))) return st;
    /* the folded prefix and its range */
    int32_t plen = ctx->prefix_e - ctx->prefix_s;
    long nf = 0;
    s->key_len = 0;
    if (plen > 0) {
        nf = nw_fold_cps(cps + ctx->prefix_s, (size_t)plen, s->fold, FOLD_CAP);
        if ((st = fold_to_key(s, nf, err))) return st;
    }
    *lo = *hi = 0;
    return prefix_range(s, nf, lo, hi, err);
}

nw_status nw_q_rank(nw_session *s, const cstate *cs, uint64_t lo, uint64_t hi, int k, nw_error *err) {
    s->nbest = 0;
    if (lo >= hi) return NW_OK;
    s->k = k;
    return rank(s, cs, lo, hi, err);
}

nw_status nw_q_score(const nw_session *s, const cstate *cs, uint32_t w, double *out, nw_error *err) {
    return score(s->m, cs, w, nw_at(&s->m->APOS, w), NONE, NONE, NONE, out, err);
}

nw_status nw_suggest(nw_session *s, const char *text, size_t len, int k, nw_suggestion *out, size_t *n_out, char *buf,
                     size_t buf_size, nw_error *err) {
    if (!s || (!text && len) || !out || !n_out || (!buf && buf_size)) return nw_fail(err, NW_E_ARG, "NULL argument");
    if (k < 1 || k > NW_MAX_K) return nw_fail(err, NW_E_ARG, "k must be an integer in [1, %d], got %d", NW_MAX_K, k);
    *n_out = 0;
    if (s->mix) return nw_mix_suggest(s, text, len, k, out, n_out, buf, buf_size, err);
    nw_ctx ctx;
    int32_t ncps = 0;
    if (nw_parse_text((const uint8_t *)(text ? text : ""), len, s->cps, &ncps, s->toks, &ctx) != 0)
        return nw_fail(err, NW_E_ARG, "text is not valid UTF-8");
    nw_status st;
    cstate cs;
    uint64_t lo = 0, hi = 0;
    if ((st = nw_q_prepare(s, s->cps, &ctx, &cs, &lo, &hi, err))) return st;
    if (lo >= hi) return NW_OK;
    if ((st = nw_q_rank(s, &cs, lo, hi, k, err))) return st;
    int at_start = ctx.prev_kind == NW_CTX_BOS;
    int mode_start = nw_q_recase_mode(s->cps + ctx.prefix_s, ctx.prefix_e - ctx.prefix_s, at_start);
    out_buf o = {buf, buf_size, 0, 0};
    for (int i = 0; i < s->nbest; i++) {
        size_t at = o.used;
        if ((st = nw_q_emit(s, s->best[i].id, mode_start, &o, err))) return st;
        out[i].word = buf + at;
        out[i].len = o.used - at - 1;
        out[i].prob = s->best[i].score;
    }
    *n_out = (size_t)s->nbest;
    return NW_OK;
}

static nw_status token_id(nw_session *s, const char *tok, int predicted, uint32_t *id, nw_error *err) {
    const nw_model *m = s->m;
    if (!predicted && (tok == NULL || strcmp(tok, "<s>") == 0)) { *id = m->n + 2; return NW_OK; }
    if (tok == NULL) return nw_fail(err, NW_E_ARG, "word must not be NULL");
    if (strcmp(tok, "<unk>") == 0) { *id = m->n + 1; return NW_OK; }
    if (!predicted && strcmp(tok, "</s>") == 0)
        return nw_fail(err, NW_E_ARG, "'</s>' is never a history; use NULL or '<s>' for a sentence start");
    if (predicted && strcmp(tok, "</s>") == 0) { *id = m->n; return NW_OK; }
    if (predicted && strcmp(tok, "<s>") == 0) return nw_fail(err, NW_E_ARG, "'<s>' is never predicted");
    nw_status st = fold_to_key(s, nw_fold_utf8((const uint8_t *)tok, strlen(tok), s->fold, FOLD_CAP), err);
    return st ? st : id_of_key(s, id, err);
}

nw_status nw_q_prob(nw_session *s, const char *word, const char *const *history, size_t n_history, double *out,
                    uint32_t *word_id, nw_error *err) {
    const nw_model *m = s->m;
    uint32_t ids[2], w;
    int nids = 0;
    nw_status st;
    /* Model._context_ids: the last order-1 tokens, never reaching back across a sentence start */
    size_t first = 0;
    for (size_t i = 0; i < n_history; i++)
        if (history[i] == NULL || strcmp(history[i], "<s>") == 0) first = i;
    size_t want = (size_t)(m->order - 1);
    size_t from = n_history > first + want ? n_history - want : first;
    if (n_history == 0) {
        ids[nids++] = m->n + 2;
    } else {
        for (size_t i = 0; i < n_history; i++) /* every token is checked, as Python maps them all */
            if ((st = token_id(s, history[i], 0, &w, err))) return st;
        for (size_t i = from; i < n_history; i++)
            if ((st = token_id(s, history[i], 0, &ids[nids++], err))) return st;
    }
    if ((st = token_id(s, word, 1, &w, err))) return st;
    *word_id = w;
    cstate cs;
    if ((st = context(m, ids, nids, &cs, err))) return st;
    return score(m, &cs, w, nw_at(&m->APOS, w), NONE, NONE, NONE, out, err);
}

nw_status nw_prob(nw_session *s, const char *word, const char *const *history, size_t n_history, double *out,
                  nw_error *err) {
    if (!s || !out || (!history && n_history)) return nw_fail(err, NW_E_ARG, "NULL argument");
    if (s->mix) return nw_mix_prob(s, word, history, n_history, out, err);
    uint32_t w;
    return nw_q_prob(s, word, history, n_history, out, &w, err);
}

nw_status nw_fold(const char *word, size_t len, char *out, size_t cap, size_t *out_len) {
    int32_t *buf = (int32_t *)malloc(sizeof(int32_t) * FOLD_CAP);
    if (!buf) return NW_E_NOMEM;
    long n = nw_fold_utf8((const uint8_t *)word, len, buf, FOLD_CAP);
    if (n < 0) { free(buf); return NW_E_ARG; }
    size_t k = 0;
    for (long i = 0; i < n; i++) {
        uint8_t tmp[4];
        size_t e = nw_utf8_encode((uint32_t)buf[i], tmp);
        if (k + e + 1 > cap) { free(buf); return NW_E_BUFFER; }
        memcpy(out + k, tmp, e);
        k += e;
    }
    out[k] = 0;
    *out_len = k;
    free(buf);
    return NW_OK;
}

nw_status nw_parse_typed(const char *text, size_t len, nw_parsed *out) {
    static __thread int32_t cps[NW_TAIL_CAP];
    static __thread nw_tok toks[NW_TAIL_CAP];
    nw_ctx c;
    int32_t n = 0;
    if (nw_parse_text((const uint8_t *)text, len, cps, &n, toks, &c) != 0) return NW_E_ARG;
    /* the tail as UTF-8, with byte offsets of every code point */
    size_t off[NW_TAIL_CAP + 1];
    size_t k = 0;
    for (int32_t i = 0; i < n; i++) {
        off[i] = k;
        k += nw_utf8_encode((uint32_t)cps[i], (uint8_t *)out->tail + k);
    }
    off[n] = k;
    out->tail[k] = 0;
    out->tail_len = k;
    out->previous_kind = c.prev_kind;
    out->before_kind = c.before_kind;
    out->previous_off = off[c.prev_s];
    out->previous_len = off[c.prev_e] - off[c.prev_s];
    out->before_off = off[c.before_s];
    out->before_len = off[c.before_e] - off[c.before_s];
    out->prefix_off = off[c.prefix_s];
    out->prefix_len = off[c.prefix_e] - off[c.prefix_s];
    return NW_OK;
}
