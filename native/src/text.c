/* The text rules of nextword/text.py (docs/FORMAT.md §9.1) on Unicode code points.
 *
 * NFC and full case folding come from utf8proc; the character classes follow Python's
 * str methods and `re` classes, which are functions of the general category except where
 * Python reads a property utf8proc lacks (Other_Lowercase/Other_Uppercase, and
 * upper-case mappings to several characters): those come from unicode_tables.h, generated
 * from Python's unicodedata by native/tools/gen_unicode_tables.py.
 *
 *   str.isalnum  = category L* or N*   (checked for every code point in tests/test_native.py)
 *   str.isdecimal / re \d = category Nd
 *   str.isspace / re \s  = the 29 code points below (bidi class WS/B/S, or Zs)
 *   str.islower / isupper = Lowercase / Uppercase properties, istitle (one char) = Lt
 */
#include "text.h"

#include <utf8proc.h>

#include "internal.h"
#include "unicode_tables.h"

#define COUNT(a) (sizeof(a) / sizeof((a)[0]))

static int in_ranges(const uint32_t (*r)[2], size_t n, uint32_t cp) {
    size_t lo = 0, hi = n;
    while (lo < hi) {
        size_t mid = (lo + hi) / 2;
        if (cp < r[mid][0]) hi = mid;
        else if (cp > r[mid][1]) lo = mid + 1;
        else return 1;
    }
    return 0;
}

static int cat_of(uint32_t cp) { return cp < 0x110000 ? (int)utf8proc_category((utf8proc_int32_t)cp) : UTF8PROC_CATEGORY_CN; }

static int is_alnum(uint32_t cp) {
    int c = cat_of(cp);
    return (c >= UTF8PROC_CATEGORY_LU && c <= UTF8PROC_CATEGORY_LO) ||
           (c >= UTF8PROC_CATEGORY_ND && c <= UTF8PROC_CATEGORY_NO);
}
static int is_decimal(uint32_t cp) { return cat_of(cp) == UTF8PROC_CATEGORY_ND; }
static int is_punct(uint32_t cp) {
    int c = cat_of(cp);
    return c >= UTF8PROC_CATEGORY_PC && c <= UTF8PROC_CATEGORY_PO;
}
static int is_space(uint32_t cp) {
    static const uint32_t sp[] = {0x9, 0xa, 0xb, 0xc, 0xd, 0x1c, 0x1d, 0x1e, 0x1f, 0x20, 0x85, 0xa0, 0x1680, 0x2000,
                                  0x2001, 0x2002, 0x2003, 0x2004, 0x2005, 0x2006, 0x2007, 0x2008, 0x2009, 0x200a,
                                  0x2028, 0x2029, 0x202f, 0x205f, 0x3000};
    for (size_t i = 0; i < COUNT(sp); i++)
        if (sp[i] == cp) return 1;
    return 0;
}
static int is_sentence_end(uint32_t cp) {
    /* text._SENTENCE_END_CHARS: . ! ? … ‼ ‽ ⁇ ⁈ ⁉ 。 ！ ？ ｡ and the line ends */
    static const uint32_t se[] = {'.', '!', '?', 0x2026, 0x203c, 0x203d, 0x2047, 0x2048, 0x2049, 0x3002, 0xff01,
                                  0xff1f, 0xff61, '\n', '\r', 0x2028, 0x2029, 0x85, 0x0b, 0x0c};
    for (size_t i = 0; i < COUNT(se); i++)
        if (se[i] == cp) return 1;
    return 0;
}
static int is_joiner(uint32_t cp) { return cp == '\'' || cp == 0x2019 || cp == '-' || cp == 0x2010 || cp == 0x2011; }
/* `ch in text._JOINERS` in _parse_tail: that Python string also holds the backslash that
 * escapes the hyphen inside the regex class, so a word followed by a typed "\\" is a prefix
 * there too (mirrored here; the regex's joiners above have no backslash). */
static int in_joiners_string(uint32_t cp) { return is_joiner(cp); }

int nw_is_lower(uint32_t cp) { return cat_of(cp) == UTF8PROC_CATEGORY_LL || in_ranges(nw_other_lower, COUNT(nw_other_lower), cp); }
int nw_is_upper(uint32_t cp) { return cat_of(cp) == UTF8PROC_CATEGORY_LU || in_ranges(nw_other_upper, COUNT(nw_other_upper), cp); }
int nw_is_title(uint32_t cp) { return cat_of(cp) == UTF8PROC_CATEGORY_LT; }

unsigned nw_char_class(uint32_t cp) {
    unsigned c = 0;
    if (is_alnum(cp)) c |= NW_CC_ALNUM;
    if (is_decimal(cp)) c |= NW_CC_DECIMAL;
    if (is_space(cp)) c |= NW_CC_SPACE;
    if (is_punct(cp)) c |= NW_CC_PUNCT;
    if (nw_is_lower(cp)) c |= NW_CC_LOWER;
    if (nw_is_upper(cp)) c |= NW_CC_UPPER;
    if (nw_is_title(cp)) c |= NW_CC_TITLE;
    if (is_sentence_end(cp)) c |= NW_CC_SENTENCE_END;
    return c;
}

int nw_char_upper(uint32_t cp, uint32_t out[3]) {
    size_t lo = 0, hi = COUNT(nw_upper_multi);
    while (lo < hi) {
        size_t mid = (lo + hi) / 2;
        if (nw_upper_multi[mid][0] < cp) lo = mid + 1; else hi = mid;
    }
    if (lo < COUNT(nw_upper_multi) && nw_upper_multi[lo][0] == cp) {
        int k = 0;
        for (int j = 1; j <= 3 && nw_upper_multi[lo][j]; j++) out[k++] = nw_upper_multi[lo][j];
        return k;
    }
    out[0] = cp < 0x110000 ? (uint32_t)utf8proc_toupper((utf8proc_int32_t)cp) : cp;
    return 1;
}

const char *nw_unicode_version(void) { return utf8proc_unicode_version(); }

size_t nw_utf8_encode(uint32_t cp, uint8_t out[4]) {
    return (size_t)utf8proc_encode_char((utf8proc_int32_t)cp, out);
}

size_t nw_utf8_decode(const uint8_t *p, size_t n, uint32_t *cp) {
    utf8proc_int32_t c;
    utf8proc_ssize_t k = utf8proc_iterate(p, (utf8proc_ssize_t)n, &c);
    if (k <= 0 || c < 0) return 0;
    *cp = (uint32_t)c;
    return (size_t)k;
}

/* -- NFC and folding ---------------------------------------------------------------- */

static long nfc_utf8(const uint8_t *s, size_t len, int32_t *buf, size_t cap, int fold) {
    utf8proc_option_t opt = (utf8proc_option_t)(UTF8PROC_STABLE | UTF8PROC_COMPOSE | (fold ? UTF8PROC_CASEFOLD : 0));
    utf8proc_ssize_t n = utf8proc_decompose(s, (utf8proc_ssize_t)len, (utf8proc_int32_t *)buf, (utf8proc_ssize_t)cap, opt);
    if (n < 0) return -1;
    if ((size_t)n > cap) return -2;
    n = utf8proc_normalize_utf32((utf8proc_int32_t *)buf, n, opt);
    if (n < 0) return -1;
    if (fold) /* text._FOLD_PAIRS, after NFC as in text.fold */
        for (utf8proc_ssize_t i = 0; i < n; i++) {
            if (buf[i] == 0x2019) buf[i] = '\'';
            else if (buf[i] == 0x2010 || buf[i] == 0x2011) buf[i] = '-';
        }
    return (long)n;
}

long nw_fold_utf8(const uint8_t *s, size_t len, int32_t *buf, size_t cap) { return nfc_utf8(s, len, buf, cap, 1); }

long nw_fold_cps(const int32_t *cps, size_t n, int32_t *buf, size_t cap) {
    /* decompose code point by code point (no UTF-8 round trip), then compose */
    utf8proc_option_t opt = (utf8proc_option_t)(UTF8PROC_STABLE | UTF8PROC_COMPOSE | UTF8PROC_CASEFOLD);
    size_t used = 0;
    for (size_t i = 0; i < n; i++) {
        int boundclass = UTF8PROC_BOUNDCLASS_START;
        utf8proc_ssize_t k = utf8proc_decompose_char(cps[i], (utf8proc_int32_t *)buf + used,
                                                     used < cap ? (utf8proc_ssize_t)(cap - used) : 0, opt, &boundclass);
        if (k < 0) return -1;
        used += (size_t)k;
        if (used > cap) return -2;
    }
    utf8proc_ssize_t m = utf8proc_normalize_utf32((utf8proc_int32_t *)buf, (utf8proc_ssize_t)used, opt);
    if (m < 0) return -1;
    for (utf8proc_ssize_t i = 0; i < m; i++) {
        if (buf[i] == 0x2019) buf[i] = '\'';
        else if (buf[i] == 0x2010 || buf[i] == 0x2011) buf[i] = '-';
    }
    return (long)m;
}

/* -- tokens (text.TOKEN_RE) ------------------------------------------------------------ */

static int32_t tokenize(const int32_t *c, int32_t n, nw_tok *toks) {
    int32_t nt = 0, i = 0;
    while (i < n) {
        uint32_t x = (uint32_t)c[i];
        int32_t j;
        if (is_decimal(x)) { /* (?P<num>\d+(?:[.,:]\d+)+) */
            j = i;
            while (j < n && is_decimal((uint32_t)c[j])) j++;
            int groups = 0;
            while (j + 1 < n && (c[j] == '.' || c[j] == ',' || c[j] == ':') && is_decimal((uint32_t)c[j + 1])) {
                j++;
                while (j < n && is_decimal((uint32_t)c[j])) j++;
                groups++;
            }
            if (groups) {
                toks[nt++] = (nw_tok){NW_TOK_NUM, i, j};
                i = j;
                continue;
            }
        }
        if (is_alnum(x)) { /* (?P<word>[^\W_]+(?:[joiners][^\W_]+)*) */
            j = i;
            while (j < n && is_alnum((uint32_t)c[j])) j++;
            while (j + 1 < n && is_joiner((uint32_t)c[j]) && is_alnum((uint32_t)c[j + 1])) {
                j++;
                while (j < n && is_alnum((uint32_t)c[j])) j++;
            }
            toks[nt++] = (nw_tok){NW_TOK_WORD, i, j};
            i = j;
        } else if (is_sentence_end(x)) { /* (?P<end>[ends]+) */
            j = i;
            while (j < n && is_sentence_end((uint32_t)c[j])) j++;
            toks[nt++] = (nw_tok){NW_TOK_END, i, j};
            i = j;
        } else if (x != '_' && !is_space(x)) { /* (?P<other>[^\w\s]) */
            toks[nt++] = (nw_tok){NW_TOK_OTHER, i, i + 1};
            i++;
        } else {
            i++;
        }
    }
    return nt;
}

int nw_is_word_cps(const int32_t *cps, int32_t s, int32_t e) {
    /* text.is_word: a letter = \w but not \d and not _ */
    for (int32_t i = s; i < e; i++)
        if (is_alnum((uint32_t)cps[i]) && !is_decimal((uint32_t)cps[i])) return 1;
    return 0;
}

/* text._parse_tail; returns 1 found, 0 None (look further back), -1 invalid UTF-8 */
static int parse_tail(const uint8_t *text, size_t len, size_t window, int final, int32_t *cps, int32_t *n_cps,
                      nw_tok *toks, nw_ctx *out) {
    /* the last `window` code points: walk back over lead bytes */
    size_t start = len, count = 0;
    while (start > 0 && count < window) {
        start--;
        if ((text[start] & 0xC0) != 0x80) count++;
    }
    int truncated = 0;
    for (size_t q = start; q > 0; q--)
        if ((text[q - 1] & 0xC0) != 0x80) { truncated = 1; break; }
    long L = nfc_utf8(text + start, len - start, cps, NW_TAIL_CAP, 0);
    if (L < 0) return -1;
    *n_cps = (int32_t)L;
    int32_t nt = tokenize(cps, (int32_t)L, toks);
    int32_t first = 0;
    int cut = truncated && nt > 0 && toks[0].start == 0 && (toks[0].group == NW_TOK_WORD || toks[0].group == NW_TOK_NUM);
    out->prefix_s = out->prefix_e = 0;
    if (nt > 0) {
        nw_tok last = toks[nt - 1];
        if ((last.group == NW_TOK_WORD || last.group == NW_TOK_NUM) && last.end == L) {
            if (cut && nt == 1 && !final) return 0;
            out->prefix_s = last.start;
            out->prefix_e = last.end;
            nt--;
        } else if (last.group == NW_TOK_OTHER && in_joiners_string((uint32_t)cps[last.start]) && last.end == L && nt >= 2 &&
                   toks[nt - 2].group == NW_TOK_WORD && toks[nt - 2].end == last.start) {
            out->prefix_s = toks[nt - 2].start;
            out->prefix_e = last.end;
            nt -= 2;
        }
    }
    if (cut && nt > 0) first = 1;
    int kind[2];
    int32_t fs[2] = {0, 0}, fe[2] = {0, 0};
    int nf = 0, broke = 0;
    for (int32_t i = nt - 1; i >= first; i--) {
        nw_tok t = toks[i];
        if (t.group == NW_TOK_WORD && nw_is_word_cps(cps, t.start, t.end)) {
            kind[nf] = NW_CTX_WORD; fs[nf] = t.start; fe[nf] = t.end; nf++;
        } else if (t.group == NW_TOK_END) {
            kind[nf++] = NW_CTX_BOS;
        } else if (t.group == NW_TOK_NUM || t.group == NW_TOK_WORD || !is_punct((uint32_t)cps[t.start])) {
            if (nf == 0 || kind[nf - 1] != NW_CTX_UNK) kind[nf++] = NW_CTX_UNK;
        }
        if (nf > 0 && (kind[nf - 1] == NW_CTX_BOS || nf == 2)) { broke = 1; break; }
    }
    if (!broke) {
        if (truncated && !final) return 0;
        kind[nf++] = NW_CTX_BOS;
    }
    if (kind[0] == NW_CTX_BOS) {
        out->prev_kind = NW_CTX_BOS;
        out->before_kind = NW_CTX_NONE;
        return 1;
    }
    out->prev_kind = kind[0]; out->prev_s = fs[0]; out->prev_e = fe[0];
    out->before_kind = kind[1]; out->before_s = fs[1]; out->before_e = fe[1];
    return 1;
}

int nw_parse_text(const uint8_t *text, size_t len, int32_t *cps, int32_t *n_cps, nw_tok *toks, nw_ctx *out) {
    /* text.parse_typed: the last 40 code points first, which almost always suffice */
    size_t ncp = 0;
    for (size_t i = 0; i < len && ncp <= NW_FIRST_WINDOW; i++)
        if ((text[i] & 0xC0) != 0x80) ncp++;
    memset(out, 0, sizeof *out);
    if (ncp > NW_FIRST_WINDOW) {
        int r = parse_tail(text, len, NW_FIRST_WINDOW, 0, cps, n_cps, toks, out);
        if (r != 0) return r < 0 ? -1 : 0;
    }
    return parse_tail(text, len, NW_MAX_CONTEXT_CHARS, 1, cps, n_cps, toks, out) < 0 ? -1 : 0;
}
