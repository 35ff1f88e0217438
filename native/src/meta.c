/* A MessagePack reader for META: every length is checked against the section, strings
 * must be UTF-8 and map keys str or bin (Python's msgpack.unpackb(raw=False,
 * strict_map_key=True) refuses the same). */
#include "meta.h"

#include <string.h>

#include "internal.h"

static int need(nw_mp *m, size_t k) { return m->n - m->i >= k ? 0 : -1; }
static uint64_t be(const uint8_t *p, int k) {
    uint64_t x = 0;
    for (int i = 0; i < k; i++) x = (x << 8) | p[i];
    return x;
}

static int valid_utf8(const uint8_t *s, uint32_t n) {
    size_t i = 0;
    while (i < n) {
        uint32_t cp;
        size_t k = nw_utf8_decode(s + i, n - i, &cp);
        if (k == 0) return 0;
        i += k;
    }
    return 1;
}

static int payload(nw_mp *m, nw_mpv *v, uint64_t len) {
    if (need(m, (size_t)len) || len > 0xFFFFFFFFu) return -1;
    v->s = m->p + m->i;
    v->len = (uint32_t)len;
    m->i += (size_t)len;
    return 0;
}

/* a timestamp (ext -1) whose nanoseconds exceed 999999999 is refused by Python's msgpack */
static int timestamp_ok(const nw_mpv *v) {
    if (v->len == 8) return (be(v->s, 4) >> 2) <= 999999999u;
    if (v->len == 12) return be(v->s, 4) <= 999999999u;
    return 1;
}

int nw_mp_read(nw_mp *m, nw_mpv *v) {
    memset(v, 0, sizeof *v);
    if (need(m, 1)) return -1;
    uint8_t b = m->p[m->i++];
    if (b <= 0x7f) { v->t = MP_POS; v->u = b; return 0; }
    if (b >= 0xe0) { v->t = MP_NEG; v->neg = (int8_t)b; return 0; }
    if ((b & 0xf0) == 0x80) { v->t = MP_MAP; v->u = b & 0x0f; return 0; }
    if ((b & 0xf0) == 0x90) { v->t = MP_ARR; v->u = b & 0x0f; return 0; }
    if ((b & 0xe0) == 0xa0) { v->t = MP_STR; if (payload(m, v, b & 0x1f)) return -1; return valid_utf8(v->s, v->len) ? 0 : -1; }
    int k;
    switch (b) {
    case 0xc0: v->t = MP_NIL; return 0;
    case 0xc2: case 0xc3: v->t = MP_BOOL; v->u = b == 0xc3; return 0;
    case 0xc4: case 0xc5: case 0xc6:
        k = 1 << (b - 0xc4);
        if (need(m, (size_t)k)) return -1;
        v->t = MP_BIN;
        m->i += (size_t)k;
        return payload(m, v, be(m->p + m->i - k, k));
    case 0xc7: case 0xc8: case 0xc9: {
        k = 1 << (b - 0xc7);
        if (need(m, (size_t)k + 1)) return -1;
        uint64_t len = be(m->p + m->i, k);
        int8_t type = (int8_t)m->p[m->i + k];
        m->i += (size_t)k + 1;
        v->t = MP_EXT;
        if (type == -1 && len != 4 && len != 8 && len != 12) return -1; /* a timestamp of a bad size */
        if (payload(m, v, len)) return -1;
        return type == -1 && !timestamp_ok(v) ? -1 : 0;
    }
    case 0xca: case 0xcb: {
        k = b == 0xca ? 4 : 8;
        if (need(m, (size_t)k)) return -1;
        uint64_t x = be(m->p + m->i, k);
        m->i += (size_t)k;
        v->t = MP_FLOAT;
        if (k == 4) { uint32_t y = (uint32_t)x; float f; memcpy(&f, &y, 4); v->f = f; }
        else memcpy(&v->f, &x, 8);
        return 0;
    }
    case 0xcc: case 0xcd: case 0xce: case 0xcf:
        k = 1 << (b - 0xcc);
        if (need(m, (size_t)k)) return -1;
        v->t = MP_POS; v->u = be(m->p + m->i, k); m->i += (size_t)k;
        return 0;
    case 0xd0: case 0xd1: case 0xd2: case 0xd3: {
        k = 1 << (b - 0xd0);
        if (need(m, (size_t)k)) return -1;
        uint64_t x = be(m->p + m->i, k);
        m->i += (size_t)k;
        int64_t s;
        if (k == 8) memcpy(&s, &x, 8);
        else { uint64_t sign = 1ull << (8 * k - 1); s = (int64_t)(x ^ sign) - (int64_t)sign; }
        if (s >= 0) { v->t = MP_POS; v->u = (uint64_t)s; } else { v->t = MP_NEG; v->neg = s; }
        return 0;
    }
    case 0xd4: case 0xd5: case 0xd6: case 0xd7: case 0xd8: {
        uint64_t len = 1ull << (b - 0xd4);
        if (need(m, 1)) return -1;
        int8_t type = (int8_t)m->p[m->i++];
        v->t = MP_EXT;
        if (type == -1 && len != 4 && len != 8) return -1;
        if (payload(m, v, len)) return -1;
        return type == -1 && !timestamp_ok(v) ? -1 : 0;
    }
    case 0xd9: case 0xda: case 0xdb:
        k = 1 << (b - 0xd9);
        if (need(m, (size_t)k)) return -1;
        v->t = MP_STR;
        m->i += (size_t)k;
        if (payload(m, v, be(m->p + m->i - k, k))) return -1;
        return valid_utf8(v->s, v->len) ? 0 : -1;
    case 0xdc: case 0xdd:
        k = b == 0xdc ? 2 : 4;
        if (need(m, (size_t)k)) return -1;
        v->t = MP_ARR; v->u = be(m->p + m->i, k); m->i += (size_t)k;
        return 0;
    case 0xde: case 0xdf:
        k = b == 0xde ? 2 : 4;
        if (need(m, (size_t)k)) return -1;
        v->t = MP_MAP; v->u = be(m->p + m->i, k); m->i += (size_t)k;
        return 0;
    default:
        return -1; /* 0xc1: never used */
    }
}

int nw_mp_skip(nw_mp *m, int depth) {
    nw_mpv v;
    if (depth > 512 || nw_mp_read(m, &v)) return -1;
    if (v.t == MP_ARR) {
        for (uint64_t j = 0; j < v.u; j++)
            if (nw_mp_skip(m, depth + 1)) return -1;
    } else if (v.t == MP_MAP) {
        for (uint64_t j = 0; j < v.u; j++) {
            nw_mpv key;
            if (nw_mp_read(m, &key) || (key.t != MP_STR && key.t != MP_BIN)) return -1;
            if (nw_mp_skip(m, depth + 1)) return -1;
        }
    }
    return 0;
}

int nw_mp_is_int(const nw_mpv *v) { return v->t == MP_POS || v->t == MP_NEG; }
double nw_mp_num(const nw_mpv *v) {
    if (v->t == MP_POS) return (double)v->u;
    if (v->t == MP_NEG) return (double)v->neg;
    return v->f;
}
int nw_mp_str_eq(const nw_mpv *v, const char *s) {
    size_t n = strlen(s);
    return v->t == MP_STR && v->len == n && memcmp(v->s, s, n) == 0;
}
