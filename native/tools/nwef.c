/* nwef: the runtime's chunked Elias-Fano reader (src/ef.c, format 1.6) on one given sequence,
 * so a test can compare it with nextword/succinct.py value by value (built with the
 * sanitizers by `make ef-tool`: a read outside the header or stream aborts).
 *
 *   nwef HEAD HW STREAM N STRICT [CHUNKS] < QUERIES
 *
 * HEAD: the header's raw bytes (HW = 4 or 8 bytes per entry), STREAM: the stream's bytes,
 * N: the number of values, STRICT: 1 for a strictly increasing sequence, CHUNKS: 0 to leave
 * the chunk headers to the readers (as for the n-gram-sized sequences; default 1). Prints "open OK"
 * or "open ERR <message>", then one line per query line:
 *   g J          -> Y_J, or "E" if the chunk is damaged
 *   l Y S E      -> "J V" (the first J in [S, E) with Y_J >= Y, and Y_J; V is "-" when J = E), or "E"
 *   a            -> every value, one per line, then "end" (or "E" at the first damaged chunk)
 */
#define _POSIX_C_SOURCE 200809L
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>

#include "ef.h"

static uint8_t *slurp(const char *path, uint64_t *len) {
    FILE *f = fopen(path, "rb");
    if (!f) { fprintf(stderr, "nwef: cannot read %s\n", path); exit(2); }
    fseek(f, 0, SEEK_END);
    long n = ftell(f);
    fseek(f, 0, SEEK_SET);
    uint8_t *p = malloc((size_t)n + 1); /* exactly the file (+1: malloc(0)): ASan sees any read past it */
    if (!p || fread(p, 1, (size_t)n, f) != (size_t)n) exit(2);
    fclose(f);
    *len = (uint64_t)n;
    return p;
}

int main(int argc, char **argv) {
    if (argc != 6 && argc != 7) { fprintf(stderr, "usage: nwef HEAD HW STREAM N STRICT [CHUNKS] < QUERIES\n"); return 2; }
    uint64_t hlen, slen;
    uint8_t *head = slurp(argv[1], &hlen), *stream = slurp(argv[3], &slen);
    int hw = atoi(argv[2]);
    uint64_t n = strtoull(argv[4], NULL, 10);
    nw_ef e;
    nw_error err;
    if (hw != 4 && hw != 8) return 2;
    int chunks = argc == 7 ? atoi(argv[6]) : 1;
    if (nw_ef_open(&e, "SEQ", head, hlen / (uint64_t)hw, hw, stream, slen, n, atoi(argv[5]), chunks, &err) != NW_OK) {
        printf("open ERR %s\n", err.message);
        free(head);
        free(stream);
        return 0;
    }
    printf("open OK\n");
    char line[256];
    while (fgets(line, sizeof line, stdin)) {
        uint64_t a, b, c, at, v;
        if (sscanf(line, "g %" SCNu64, &a) == 1) {
            if (nw_ef_get(&e, a, &v)) printf("E\n"); else printf("%" PRIu64 "\n", v);
        } else if (sscanf(line, "l %" SCNu64 " %" SCNu64 " %" SCNu64, &a, &b, &c) == 3) {
            if (c > n || nw_ef_lower(&e, a, b, c, &at, &v)) printf("E\n");
            else if (at < c) printf("%" PRIu64 " %" PRIu64 "\n", at, v);
            else printf("%" PRIu64 " -\n", at);
        } else if (line[0] == 'a') {
            uint64_t vals[NW_EF_CHUNK];
            int m, bad = 0;
            for (uint64_t ch = 0; ch < e.chunks && !bad; ch++) {
                if (nw_ef_chunk(&e, ch, vals, &m)) { printf("E\n"); bad = 1; break; }
                for (int k = 0; k < m; k++) printf("%" PRIu64 "\n", vals[k]);
            }
            if (!bad) printf("end\n");
        }
    }
    free(head);
    free(stream);
    return 0;
}
