/* The META section (MessagePack, docs/FORMAT.md §7.1): a small bounds-checked reader. */
#ifndef NW_META_H
#define NW_META_H
#include <stddef.h>
#include <stdint.h>

typedef enum { MP_NIL, MP_BOOL, MP_NEG, MP_POS, MP_FLOAT, MP_STR, MP_BIN, MP_ARR, MP_MAP, MP_EXT } nw_mpt;

typedef struct nw_mpv {
    nw_mpt t;
    int64_t neg;      /* MP_NEG */
    uint64_t u;       /* MP_POS, MP_BOOL; count of MP_ARR/MP_MAP */
    double f;         /* MP_FLOAT */
    const uint8_t *s; /* MP_STR/MP_BIN/MP_EXT payload */
    uint32_t len;
} nw_mpv;

typedef struct nw_mp {
    const uint8_t *p;
    size_t n, i;
} nw_mp;

/* read one value's header (and a str/bin/ext payload); 0 on success */
int nw_mp_read(nw_mp *m, nw_mpv *v);
/* skip one complete value (checking nested keys and strings as Python's msgpack does) */
int nw_mp_skip(nw_mp *m, int depth);
/* whether v is an integer (not bool) and its value as a double */
int nw_mp_is_int(const nw_mpv *v);
double nw_mp_num(const nw_mpv *v);
int nw_mp_str_eq(const nw_mpv *v, const char *s);
#endif
