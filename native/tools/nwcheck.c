/* nwcheck: two properties of the runtime that a test cannot see through ctypes.
 *
 *   nwcheck --alloc MODEL QUERIES      heap allocations during queries (malloc/calloc/realloc/free
 *                                      counted by wrappers around glibc's; must print 0)
 *   nwcheck --threads N MODEL QUERIES  N threads share one model (a session each, no locks) and
 *                                      must give the single-threaded answers, bit for bit
 *
 * QUERIES: one typed text per line. Prints one JSON line; exit 1 on a difference.
 */
#define _GNU_SOURCE
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "nextword.h"

/* -- counting allocator (glibc: the real one is __libc_malloc & co.) --------------------- */
extern void *__libc_malloc(size_t);
extern void *__libc_calloc(size_t, size_t);
extern void *__libc_realloc(void *, size_t);
extern void __libc_free(void *);
static volatile long counting, n_alloc;
void *malloc(size_t n) { if (counting) __atomic_add_fetch(&n_alloc, 1, __ATOMIC_RELAXED); return __libc_malloc(n); }
void *calloc(size_t a, size_t b) { if (counting) __atomic_add_fetch(&n_alloc, 1, __ATOMIC_RELAXED); return __libc_calloc(a, b); }
void *realloc(void *p, size_t n) { if (counting) __atomic_add_fetch(&n_alloc, 1, __ATOMIC_RELAXED); return __libc_realloc(p, n); }
void free(void *p) { if (counting && p) __atomic_add_fetch(&n_alloc, 1, __ATOMIC_RELAXED); __libc_free(p); }

static char *data;
static size_t nq, *qs, *ql;
static nw_model *model;
#define K 5

static void load_queries(const char *path) {
    FILE *f = fopen(path, "rb");
    if (!f) { fprintf(stderr, "nwcheck: cannot read %s\n", path); exit(2); }
    fseek(f, 0, SEEK_END);
    long n = ftell(f);
    fseek(f, 0, SEEK_SET);
    data = malloc((size_t)n + 1);
    if (fread(data, 1, (size_t)n, f) != (size_t)n) exit(2);
    fclose(f);
    for (long i = 0; i < n; i++) nq += data[i] == '\n';
    qs = malloc(sizeof(size_t) * (nq + 1));
    ql = malloc(sizeof(size_t) * (nq + 1));
    nq = 0;
    for (long i = 0, s = 0; i < n; i++)
        if (data[i] == '\n') { qs[nq] = (size_t)s; ql[nq++] = (size_t)(i - s); s = i + 1; }
}

typedef struct answer { double prob[K]; size_t n; char words[K][64]; } answer;

static int run(nw_session *s, answer *out) {
    nw_suggestion sug[K];
    char buf[4096];
    nw_error err;
    for (size_t q = 0; q < nq; q++) {
        size_t n;
        if (nw_suggest(s, data + qs[q], ql[q], K, sug, &n, buf, sizeof buf, &err) != NW_OK) {
            fprintf(stderr, "nwcheck: %s\n", err.message);
            return 1;
        }
        if (out) {
            out[q].n = n;
            for (size_t i = 0; i < n; i++) {
                out[q].prob[i] = sug[i].prob;
                snprintf(out[q].words[i], 64, "%s", sug[i].word);
            }
        }
    }
    return 0;
}

static answer *expected;
static void *worker(void *arg) {
    (void)arg;
    nw_session *s;
    nw_error err;
    if (nw_session_new(model, &s, &err) != NW_OK) return (void *)1;
    answer *got = __libc_malloc(sizeof(answer) * (nq + 1));
    long bad = 0;
    for (int round = 0; round < 3 && !bad; round++) {
        if (run(s, got)) bad = 1;
        for (size_t q = 0; q < nq && !bad; q++) {
            bad |= got[q].n != expected[q].n;
            for (size_t i = 0; i < got[q].n && !bad; i++)
                bad |= got[q].prob[i] != expected[q].prob[i] || strcmp(got[q].words[i], expected[q].words[i]) != 0;
        }
    }
    __libc_free(got);
    nw_session_free(s);
    return (void *)bad;
}

int main(int argc, char **argv) {
    nw_error err;
    if (argc == 4 && !strcmp(argv[1], "--alloc")) {
        load_queries(argv[3]);
        if (nw_open(argv[2], &model, &err) != NW_OK) { fprintf(stderr, "nwcheck: %s\n", err.message); return 1; }
        nw_session *s;
        if (nw_session_new(model, &s, &err) != NW_OK) return 1;
        if (run(s, NULL)) return 1; /* the first pass may size the trie cursor's key buffer */
        /* calibration: the wrappers do see the library's and libmarisa's (C++) allocations */
        nw_session *probe;
        counting = 1;
        nw_session_new(model, &probe, &err);
        nw_session_free(probe);
        counting = 0;
        long calibration = n_alloc;
        n_alloc = 0;
        if (calibration < 4) { fprintf(stderr, "nwcheck: the allocation counter sees nothing\n"); return 1; }
        counting = 1;
        int rc = run(s, NULL);
        counting = 0;
        double p;
        const char *hist[1] = {"the"};
        counting = 1;
        for (int i = 0; i < 1000; i++) rc |= nw_prob(s, "of", hist, 1, &p, &err) != NW_OK;
        counting = 0;
        printf("{\"queries\": %zu, \"allocations\": %ld, \"calibration_allocations\": %ld}\n", nq, n_alloc, calibration);
        nw_session_free(s);
        nw_close(model);
        return rc || n_alloc != 0;
    }
    if (argc == 5 && !strcmp(argv[1], "--threads")) {
        int nt = atoi(argv[2]);
        if (nt < 1 || nt > 64) return 2;
        load_queries(argv[4]);
        if (nw_open(argv[3], &model, &err) != NW_OK) { fprintf(stderr, "nwcheck: %s\n", err.message); return 1; }
        nw_session *s;
        if (nw_session_new(model, &s, &err) != NW_OK) return 1;
        expected = malloc(sizeof(answer) * (nq + 1));
        if (run(s, expected)) return 1;
        nw_session_free(s);
        pthread_t th[64];
        for (int i = 0; i < nt; i++) pthread_create(&th[i], NULL, worker, NULL);
        long bad = 0;
        for (int i = 0; i < nt; i++) {
            void *r;
            pthread_join(th[i], &r);
            bad += r != NULL;
        }
        printf("{\"threads\": %d, \"queries\": %zu, \"threads_differing\": %ld}\n", nt, nq, bad);
        nw_close(model);
        return bad != 0;
    }
    fprintf(stderr, "usage: nwcheck --alloc MODEL QUERIES | nwcheck --threads N MODEL QUERIES\n");
    return 2;
}
