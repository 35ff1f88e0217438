/* nwsuggest: the native runtime on the command line.
 *
 *   nwsuggest [-k K] [--json] MODEL TEXT...     suggestions for the typed TEXT (words joined by spaces)
 *   nwsuggest --bench [-k K] MODEL QUERIES      latency of every line of QUERIES as a typed text (JSON)
 *
 * Errors: one line `nwsuggest: error: ...` on stderr; exit 2 for usage, 1 for data.
 */
#define _POSIX_C_SOURCE 200809L
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "nextword.h"

static int usage(const char *why) {
    fprintf(stderr, "nwsuggest: error: %s (usage: nwsuggest [-k K] [--json] MODEL TEXT... | nwsuggest --bench [-k K] MODEL QUERIES)\n", why);
    return 2;
}

static double now_us(void) {
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (double)t.tv_sec * 1e6 + (double)t.tv_nsec / 1e3;
}

static int cmp_double(const void *a, const void *b) {
    double x = *(const double *)a, y = *(const double *)b;
    return x < y ? -1 : x > y;
}

static long rss_kb(void) {
    FILE *f = fopen("/proc/self/status", "r");
    char line[256];
    long kb = -1;
    if (!f) return -1;
    while (fgets(line, sizeof line, f))
        if (strncmp(line, "VmRSS:", 6) == 0) kb = strtol(line + 6, NULL, 10);
    fclose(f);
    return kb;
}

static void json_str(const char *s, size_t n) {
    putchar('"');
    for (size_t i = 0; i < n; i++) {
        unsigned char c = (unsigned char)s[i];
        if (c == '"' || c == '\\') printf("\\%c", c);
        else if (c < 0x20) printf("\\u%04x", c);
        else putchar(c);
    }
    putchar('"');
}

static int bench(const char *model_path, const char *queries, int k) {
    nw_error err;
    nw_model *m = NULL;
    long rss0 = rss_kb();
    /* open time: the median of 21 opens (mmap + every load-time check) */
    double opens[21];
    for (int i = 0; i < 21; i++) {
        double t0 = now_us();
        if (nw_open(model_path, &m, &err) != NW_OK) {
            fprintf(stderr, "nwsuggest: error: %s\n", err.message);
            return 1;
        }
        opens[i] = now_us() - t0;
        if (i < 20) nw_close(m);
    }
    qsort(opens, 21, sizeof(double), cmp_double);
    FILE *f = fopen(queries, "rb");
    if (!f) {
        fprintf(stderr, "nwsuggest: error: cannot read %s\n", queries);
        nw_close(m);
        return 1;
    }
    size_t cap = 1 << 20, n = 0, nq = 0;
    char *data = malloc(cap);
    for (;;) {
        if (n + 65536 > cap) data = realloc(data, cap *= 2);
        size_t got = fread(data + n, 1, 65536, f);
        if (!got) break;
        n += got;
    }
    fclose(f);
    for (size_t i = 0; i < n; i++) nq += data[i] == '\n';
    size_t *start = malloc(sizeof(size_t) * (nq + 1)), *len = malloc(sizeof(size_t) * (nq + 1));
    double *lat = malloc(sizeof(double) * (nq + 1));
    nq = 0;
    for (size_t i = 0, s = 0; i < n; i++)
        if (data[i] == '\n') { start[nq] = s; len[nq++] = i - s; s = i + 1; }
    nw_session *s = NULL;
    if (nw_session_new(m, &s, &err) != NW_OK) {
        fprintf(stderr, "nwsuggest: error: %s\n", err.message);
        return 1;
    }
    nw_suggestion out[NW_MAX_K];
    char buf[8192];
    size_t got;
    size_t answered = 0;
    for (int round = 0; round < 2; round++) /* round 0 warms the page cache and the caches */
        for (size_t q = 0; q < nq; q++) {
            double t0 = now_us();
            nw_status st = nw_suggest(s, data + start[q], len[q], k, out, &got, buf, sizeof buf, &err);
            double dt = now_us() - t0;
            if (st != NW_OK) {
                fprintf(stderr, "nwsuggest: error: query %zu: %s\n", q, err.message);
                return 1;
            }
            if (round == 1) { lat[q] = dt; answered += got > 0; }
        }
    long rss1 = rss_kb();
    qsort(lat, nq, sizeof(double), cmp_double);
    double sum = 0;
    for (size_t q = 0; q < nq; q++) sum += lat[q];
    printf("{\"queries\": %zu, \"answered\": %zu, \"k\": %d, \"p50_us\": %.3f, \"p99_us\": %.3f, \"max_us\": %.3f, "
           "\"mean_us\": %.3f, \"open_ms\": %.4f, \"rss_kb_before_open\": %ld, \"rss_kb\": %ld}\n",
           nq, answered, k, nq ? lat[nq / 2] : 0.0, nq ? lat[(size_t)(nq * 0.99)] : 0.0, nq ? lat[nq - 1] : 0.0,
           nq ? sum / (double)nq : 0.0, opens[10] / 1000.0, rss0, rss1);
    nw_session_free(s);
    nw_close(m);
    free(data); free(start); free(len); free(lat);
    return 0;
}

int main(int argc, char **argv) {
    int k = 3, json = 0, do_bench = 0, i = 1;
    for (; i < argc && argv[i][0] == '-' && argv[i][1]; i++) {
        if (!strcmp(argv[i], "-k") || !strcmp(argv[i], "--k")) {
            if (i + 1 >= argc) return usage("-k needs a number");
            char *end;
            long v = strtol(argv[++i], &end, 10);
            if (*end || v < 1 || v > NW_MAX_K) return usage("k must be an integer in [1, 64]");
            k = (int)v;
        } else if (!strcmp(argv[i], "--json")) json = 1;
        else if (!strcmp(argv[i], "--bench")) do_bench = 1;
        else if (!strcmp(argv[i], "-h") || !strcmp(argv[i], "--help")) {
            printf("usage: nwsuggest [-k K] [--json] MODEL TEXT...\n       nwsuggest --bench [-k K] MODEL QUERIES\n");
            return 0;
        } else if (!strcmp(argv[i], "--")) { i++; break; }
        else return usage("unknown option");
    }
    if (do_bench) {
        if (argc - i != 2) return usage("--bench needs MODEL and QUERIES");
        return bench(argv[i], argv[i + 1], k);
    }
    if (argc - i < 1) return usage("MODEL is required");
    const char *path = argv[i++];
    size_t total = 1;
    for (int j = i; j < argc; j++) total += strlen(argv[j]) + 1;
    char *text = malloc(total);
    size_t n = 0;
    for (int j = i; j < argc; j++) {
        size_t l = strlen(argv[j]);
        memcpy(text + n, argv[j], l);
        n += l;
        if (j + 1 < argc) text[n++] = ' ';
    }
    text[n] = 0;
    nw_error err;
    nw_model *m;
    nw_session *s;
    if (nw_open(path, &m, &err) != NW_OK) {
        fprintf(stderr, "nwsuggest: error: %s\n", err.message);
        free(text);
        return 1;
    }
    if (nw_session_new(m, &s, &err) != NW_OK) {
        fprintf(stderr, "nwsuggest: error: %s\n", err.message);
        return 1;
    }
    nw_suggestion out[NW_MAX_K];
    char buf[NW_MAX_K * 256];
    size_t got;
    int rc = 0;
    if (nw_suggest(s, text, n, k, out, &got, buf, sizeof buf, &err) != NW_OK) {
        fprintf(stderr, "nwsuggest: error: %s\n", err.message);
        rc = err.code == NW_E_ARG ? 2 : 1;
    } else if (json) {
        putchar('[');
        for (size_t j = 0; j < got; j++) {
            printf(j ? ", {\"word\": " : "{\"word\": ");
            json_str(out[j].word, out[j].len);
            printf(", \"prob\": %.17g}", out[j].prob);
        }
        printf("]\n");
    } else {
        for (size_t j = 0; j < got; j++) printf("%s\t%.6f\n", out[j].word, out[j].prob);
    }
    nw_session_free(s);
    nw_close(m);
    free(text);
    return rc;
}
