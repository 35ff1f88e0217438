/* Text rules of nextword/text.py in C (internal). */
#ifndef NW_TEXT_H
#define NW_TEXT_H
#include <stddef.h>
#include <stdint.h>

#define NW_MAX_CONTEXT_CHARS 256 /* text.MAX_CONTEXT_CHARS */
#define NW_FIRST_WINDOW 40       /* text._FIRST_WINDOW */
/* NFC of 256 code points is at most 3 times longer (a canonical decomposition of 3) */
#define NW_TAIL_CAP (NW_MAX_CONTEXT_CHARS * 4 + 16)

enum { NW_TOK_NUM = 0, NW_TOK_WORD = 1, NW_TOK_END = 2, NW_TOK_OTHER = 3 };
enum { NW_CTX_WORD = 0, NW_CTX_BOS = 1, NW_CTX_UNK = 2, NW_CTX_NONE = 3 };

typedef struct nw_tok {
    int group;
    int32_t start, end;
} nw_tok;

typedef struct nw_ctx {
    int prev_kind, before_kind;
    int32_t prev_s, prev_e, before_s, before_e, prefix_s, prefix_e;
} nw_ctx;

/* parse_typed: cps receives the NFC tail (cap NW_TAIL_CAP), spans index it.
 * Returns 0, or -1 for invalid UTF-8. */
int nw_parse_text(const uint8_t *text, size_t len, int32_t *cps, int32_t *n_cps, nw_tok *toks, nw_ctx *out);

/* key of a word given as code points / UTF-8: folded code points into buf (cap).
 * Returns the length, -1 for invalid UTF-8, -2 if cap is too small. */
long nw_fold_utf8(const uint8_t *s, size_t len, int32_t *buf, size_t cap);
long nw_fold_cps(const int32_t *cps, size_t n, int32_t *buf, size_t cap);

int nw_is_word_cps(const int32_t *cps, int32_t s, int32_t e);
#endif
