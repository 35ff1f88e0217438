/* Internal query interface shared by query.c (one model) and mix.c (a mixture of models).
 *
 * A mixture asks each part the same questions a single-model query asks itself (the
 * context state, the prefix range, the exact top m, one word's probability, a display
 * spelling), so these are the single-model query's own functions, not copies: the
 * mixture's probabilities are built from exactly the floats nw_suggest returns. */
#ifndef NW_QUERY_H
#define NW_QUERY_H

#include "internal.h"
#include "text.h"

#define FOLD_CAP 16384

typedef struct cand {
    double score;
    uint32_t id;
} cand;

struct nw_mix_session;

struct nw_session {
    const nw_model *m;
    void *cursor;
    int32_t cps[NW_TAIL_CAP];
    nw_tok toks[NW_TAIL_CAP];
    int32_t fold[FOLD_CAP];
    uint8_t key[FOLD_CAP * 4];
    size_t key_len;
    cand best[NW_MAX_K];
    int nbest, k;
    uint32_t top[NW_MAX_K];
    int ntop;
    struct nw_mix_session *mix; /* set for a session of a mixture (mix.c) */
};

/* the per-query context: bigram level of v, trigram level of (u, v) */
typedef struct cstate {
    uint32_t v;
    uint64_t tot2;
    double g2, lam2;
    int has3;
    uint64_t s3, e3, tot3;
    uint64_t tb; /* format 1.6: the base B of the trigram context's remapped successors (§7.18) */
    double g3, lam3;
} cstate;

typedef struct out_buf {
    char *p;
    size_t cap, used;
    int overflow;
} out_buf;

/* A session of one model file (the mixture's parts use these too). */
nw_status nw_q_session_new(const nw_model *m, nw_session **out, nw_error *err);
void nw_q_session_free(nw_session *s);
/* Context of a parsed typed text (cps/ctx from nw_parse_text) and the prefix's range of
 * alphabetical positions [lo, hi) in this session's model. */
nw_status nw_q_prepare(nw_session *s, const int32_t *cps, const nw_ctx *ctx, cstate *cs, uint64_t *lo, uint64_t *hi,
                       nw_error *err);
/* The exact top k (1..NW_MAX_K) of [lo, hi) into s->best[0 .. s->nbest), by (p desc, id asc). */
nw_status nw_q_rank(nw_session *s, const cstate *cs, uint64_t lo, uint64_t hi, int k, nw_error *err);
/* P(word id w | context) of this session's model (w < n: a vocabulary word). */
nw_status nw_q_score(const nw_session *s, const cstate *cs, uint32_t w, double *out, nw_error *err);
/* Display spelling of word id w, recased (mode of nw_q_recase_mode), NUL-terminated into o. */
nw_status nw_q_emit(nw_session *s, uint32_t w, int mode, out_buf *o, nw_error *err);
int nw_q_recase_mode(const int32_t *prefix, int32_t n, int at_start);
/* Model.prob_after in this session's model; *word_id gets the predicted word's id (n for
 * </s>, n+1 for <unk> or a word outside the vocabulary). */
nw_status nw_q_prob(nw_session *s, const char *word, const char *const *history, size_t n_history, double *out,
                    uint32_t *word_id, nw_error *err);

/* mix.c: a mixture file (docs/FORMAT.md §13) */
struct nw_mix;
nw_status nw_mix_open(const char *path, nw_model *shell, int verify_parts, nw_error *err);
void nw_mix_free(struct nw_mix *x);
nw_status nw_mix_session_new(const nw_model *m, nw_session *s, nw_error *err);
void nw_mix_session_free(struct nw_mix_session *ms);
nw_status nw_mix_suggest(nw_session *s, const char *text, size_t len, int k, nw_suggestion *out, size_t *n_out,
                         char *buf, size_t buf_size, nw_error *err);
nw_status nw_mix_prob(nw_session *s, const char *word, const char *const *history, size_t n_history, double *out,
                      nw_error *err);
nw_status nw_mix_info(const nw_model *m, nw_info *o);
/* model.c: open a model file only (a mixture's part; never a mixture) */
nw_status nw_open_model(const char *path, nw_model **out, nw_error *err);

#endif
