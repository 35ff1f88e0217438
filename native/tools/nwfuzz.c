/* nwfuzz: hostile model files through the native runtime (built with AddressSanitizer and
 * UndefinedBehaviorSanitizer by `make fuzz`; any report aborts the run).
 *
 *   nwfuzz --files FILE...                   open each file, ask everything; prints "name<TAB>status"
 *   nwfuzz --mutate N [--seed S] SEED...     N mutants of each seed file: random bytes anywhere, and
 *                                            bytes inside one section (not the trie) with every CRC fixed
 *
 * A query may answer (every probability in [0, 1]) or refuse with NW_E_DAMAGED; anything else aborts.
 * Mixture files (.nwx, told apart by their magic) go the same way; their mutants are written
 * beside the seed (parts are named relative to the mixture's folder) and may also be refused
 * with NW_E_IO (a part that is not there).
 */
#define _POSIX_C_SOURCE 200809L
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "nextword.h"

uint32_t nw_crc32(const uint8_t *p, size_t n); /* the library's (linked statically here) */

static const char *const TYPED[] = {"", "the ", "the c", "Bo a", "cat ", "a m", "zz ", "on the ", "On the m",
                                    "the cat sat on the ", "42 the ", "THE C", "the cat. ", "Bo and ", "a", "sat on a m"};
static const char *const WORDS[] = {"the", "cat", "sat", "on", "mat", "dog", "a", "ran", "bo", "and", "abe", "is",
                                    "red", "</s>", "<unk>", "zzz"};

static void ask_everything(nw_model *m) {
    nw_session *s;
    nw_error err;
    if (nw_session_new(m, &s, &err) != NW_OK) abort();
    nw_suggestion out[NW_MAX_K];
    char buf[4096];
    size_t n;
    for (size_t t = 0; t < sizeof TYPED / sizeof TYPED[0]; t++) {
        static const int ks[] = {1, 3, 10};
        for (int q = 0; q < 3; q++) {
            nw_status st = nw_suggest(s, TYPED[t], strlen(TYPED[t]), ks[q], out, &n, buf, sizeof buf, &err);
            if (st == NW_E_DAMAGED) continue;
            if (st != NW_OK) { fprintf(stderr, "unexpected status %s: %s\n", nw_status_name(st), err.message); abort(); }
            /* a damaged display spelling may hold a NUL byte (Python answers it too): len counts it */
            for (size_t i = 0; i < n; i++)
                if (!(out[i].prob >= 0.0 && out[i].prob <= 1.0 + 1e-9) || out[i].word[out[i].len] != 0) {
                    fprintf(stderr, "bad answer %g\n", out[i].prob);
                    abort();
                }
        }
    }
    const char *hists[][2] = {{NULL, NULL}, {"<unk>", NULL}, {"the", NULL}, {"the", "cat"}, {"<s>", "the"}, {"zz", "on"}, {"on", "the"}};
    for (size_t h = 0; h < sizeof hists / sizeof hists[0]; h++)
        for (size_t w = 0; w < sizeof WORDS / sizeof WORDS[0]; w++) {
            double p;
            size_t nh = hists[h][1] ? 2 : 1;
            nw_status st = nw_prob(s, WORDS[w], hists[h], nh, &p, &err);
            if (st == NW_E_DAMAGED) continue;
            if (st != NW_OK || !(p >= 0.0 && p <= 1.0 + 1e-9)) {
                fprintf(stderr, "prob: %s %g %s\n", nw_status_name(st), p, err.message);
                abort();
            }
        }
    nw_session_free(s);
}

static int is_mixture(const char *path) {
    FILE *f = fopen(path, "rb");
    unsigned char head[8] = {0};
    if (!f) return 0;
    size_t got = fread(head, 1, 8, f);
    fclose(f);
    return got == 8 && memcmp(head, "\x89NWX\r\n\x1a\n", 8) == 0;
}

static const char *try_file(const char *path) {
    nw_model *m;
    nw_error err;
    nw_status st = nw_open(path, &m, &err);
    if (st != NW_OK) {
        if (st != NW_E_FORMAT && st != NW_E_VERSION && st != NW_E_UNSUPPORTED && !(st == NW_E_IO && is_mixture(path))) {
            fprintf(stderr, "%s: unexpected open status %s: %s\n", path, nw_status_name(st), err.message);
            abort();
        }
        return nw_status_name(st);
    }
    ask_everything(m);
    nw_close(m);
    return "ok";
}

static uint8_t *read_all(const char *path, size_t *len) {
    FILE *f = fopen(path, "rb");
    if (!f) return NULL;
    fseek(f, 0, SEEK_END);
    long n = ftell(f);
    fseek(f, 0, SEEK_SET);
    uint8_t *p = malloc((size_t)n);
    if (fread(p, 1, (size_t)n, f) != (size_t)n) { fclose(f); free(p); return NULL; }
    fclose(f);
    *len = (size_t)n;
    return p;
}

static uint64_t rng_state;
static uint32_t rnd(void) {
    rng_state = rng_state * 6364136223846793005ull + 1442695040888963407ull;
    return (uint32_t)(rng_state >> 33);
}

static uint64_t le(const uint8_t *p, int k) {
    uint64_t x = 0;
    for (int i = k - 1; i >= 0; i--) x = (x << 8) | p[i];
    return x;
}
static void put32(uint8_t *p, uint32_t x) { for (int i = 0; i < 4; i++) p[i] = (uint8_t)(x >> (8 * i)); }

/* change bytes inside one section (not TRIE) of a valid file and fix every checksum */
static void crafted(uint8_t *buf, size_t len) {
    uint32_t n_sec = (uint32_t)le(buf + 12, 4);
    if (n_sec < 1 || n_sec > 64 || 32 + 32 * (size_t)n_sec > len) return;
    for (int tries = 0; tries < 16; tries++) {
        const uint8_t *e = buf + 32 + 32 * (size_t)(rnd() % n_sec);
        uint64_t off = le(e + 8, 8), ln = le(e + 16, 8);
        if (!memcmp(e, "TRIE", 4) || !ln || off + ln > len) continue;
        int k = 1 + (int)(rnd() % 4);
        for (int i = 0; i < k; i++) buf[off + rnd() % ln] = (uint8_t)rnd();
        break;
    }
    for (uint32_t i = 0; i < n_sec; i++) {
        uint8_t *e = buf + 32 + 32 * (size_t)i;
        uint64_t off = le(e + 8, 8), ln = le(e + 16, 8);
        if (off + ln <= len) put32(e + 24, nw_crc32(buf + off, ln));
    }
    put32(buf + 24, nw_crc32(buf + 32, 32 * (size_t)n_sec));
    put32(buf + 28, nw_crc32(buf, 28));
}

int main(int argc, char **argv) {
    if (argc >= 2 && !strcmp(argv[1], "--files")) {
        for (int i = 2; i < argc; i++) {
            const char *name = strrchr(argv[i], '/');
            printf("%s\t%s\n", name ? name + 1 : argv[i], try_file(argv[i]));
        }
        return 0;
    }
    if (argc >= 3 && !strcmp(argv[1], "--mutate")) {
        long n = atol(argv[2]);
        int i = 3;
        rng_state = 1;
        if (i + 1 < argc && !strcmp(argv[i], "--seed")) { rng_state = (uint64_t)atoll(argv[i + 1]); i += 2; }
        long total = 0, opened = 0;
        for (; i < argc; i++) {
            size_t len;
            uint8_t *seed = read_all(argv[i], &len);
            if (!seed) { fprintf(stderr, "nwfuzz: cannot read %s\n", argv[i]); return 1; }
            int mixture = is_mixture(argv[i]);
            char tmp[4096];
            const char *slash = strrchr(argv[i], '/');
            int dir_len = slash ? (int)(slash - argv[i]) : 1;
            snprintf(tmp, sizeof tmp, "%.*s/nwfuzz-XXXXXX", dir_len, slash ? argv[i] : ".");
            int fd = mkstemp(tmp);
            if (fd < 0) return 1;
            close(fd);
            uint8_t *buf = malloc(len);
            for (long it = 0; it < n; it++) {
                memcpy(buf, seed, len);
                if (it % 2 || mixture) {
                    int k = 1 + (int)(rnd() % 4);
                    for (int j = 0; j < k; j++) buf[rnd() % len] = (uint8_t)rnd();
                } else {
                    crafted(buf, len);
                }
                FILE *f = fopen(tmp, "wb");
                fwrite(buf, 1, len, f);
                fclose(f);
                opened += strcmp(try_file(tmp), "ok") == 0;
                total++;
            }
            free(buf);
            free(seed);
            unlink(tmp);
        }
        printf("iterations %ld, opened %ld\n", total, opened);
        return 0;
    }
    fprintf(stderr, "usage: nwfuzz --files FILE... | nwfuzz --mutate N [--seed S] SEED...\n");
    return 2;
}
