/*
 * nextword.h — the C99 API of the nextword native runtime.
 *
 * Reads a nextword model file (docs/FORMAT.md, formats 1.0–1.2 and 1.4–1.6) through a
 * read-only memory map and answers the same queries as the Python library:
 *
 *   nw_suggest  = nextword.Model.suggest(typed, k)      (words recased, probabilities)
 *   nw_prob     = nextword.Model.prob_after(word, history)
 *
 * nw_open also opens a mixture file (.nwx, docs/FORMAT.md §13: model files and weights,
 * told apart by its magic); the same calls then answer as nextword.mix.MixedModel.suggest
 * and MixedModel.prob_after: P(w | h) = Σ_i w_i·P_i(w | h) over the union vocabulary,
 * the exact top k by (probability descending, key ascending), bit for bit.
 *
 * Threads: an opened nw_model is immutable and may be shared by any number of threads
 * without locks. Each thread queries through its own nw_session (the per-thread scratch:
 * text buffers, candidate lists and the trie cursor). Creating a session allocates once;
 * a query allocates nothing on the heap: results go to caller buffers.
 *
 * Errors: every function returns an nw_status; when an nw_error is passed it also receives
 * a one-line message naming the bad value (the same checks as the Python reader). A model
 * file is untrusted input: every offset, length, id and value is checked before use.
 */
#ifndef NEXTWORD_H
#define NEXTWORD_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

#define NW_VERSION_STRING "0.1.0"

#if defined(__GNUC__) || defined(__clang__)
#define NW_API __attribute__((visibility("default")))
#else
#define NW_API
#endif

/* Largest k a query accepts (the model file's top-list fanout). */
#define NW_MAX_K 64
/* Most parts a mixture file may name (nextword.mix.MAX_PARTS). */
#define NW_MAX_PARTS 8
/* Version of the text rules this library implements (nextword.text.TEXT_RULES). */
#define NW_TEXT_RULES 1

typedef enum nw_status {
    NW_OK = 0,
    NW_E_ARG = 1,         /* bad argument: NULL, k out of [1, NW_MAX_K], invalid UTF-8 text */
    NW_E_IO = 2,          /* the file cannot be opened or mapped (or a mixture's part is missing) */
    NW_E_FORMAT = 3,      /* not a valid model file (checks of docs/FORMAT.md §8 failed) */
    NW_E_VERSION = 4,     /* a format version this library does not read (1.3, 1.7+, 2.x), or a codec that does not belong to it */
    NW_E_UNSUPPORTED = 5, /* a valid file of a kind this library does not read (unknown codec or successor coding) */
    NW_E_DAMAGED = 6,     /* a query read a value that breaks the format (damaged model data) */
    NW_E_BUFFER = 7,      /* the caller's text buffer is too small for the answer */
    NW_E_NOMEM = 8        /* out of memory (open and session creation only) */
} nw_status;

typedef struct nw_error {
    nw_status code;
    char message[320];
} nw_error;

typedef struct nw_model nw_model;
typedef struct nw_session nw_session;

/* One suggestion: `word` points into the caller's text buffer (UTF-8, NUL-terminated). */
typedef struct nw_suggestion {
    const char *word;
    size_t len;   /* bytes, without the NUL */
    double prob;  /* P(word | context) */
} nw_suggestion;

typedef struct nw_info {
    uint16_t major, minor;  /* format version (of the mixture file for a mixture) */
    uint32_t n_words;       /* vocabulary size (the union vocabulary for a mixture) */
    uint64_t bigrams, trigrams, total;  /* 0 for a mixture */
    int order;              /* 2 or 3 (a mixture: its longest part's) */
    int kneser_ney;         /* 1: interpolated modified Kneser-Ney, 0: Jelinek-Mercer, -1: a mixture */
    double lambda, lambda3; /* stored λ (JM; clamped to 0.999), λ₃ for JM order 3 */
    const char *codec;      /* "exact", or "mixture" */
    uint64_t file_size;     /* a mixture: its own file plus its parts */
    int text_rules;         /* version of the text rules the counts were cut with */
    int n_parts;            /* 0 for a model file; 1..NW_MAX_PARTS for a mixture */
    double weights[NW_MAX_PARTS]; /* a mixture's weights as it uses them (normalised as Python does) */
} nw_info;

/* Open `path` (mmap + every load-time check of docs/FORMAT.md §8). A mixture file
 * (§13) is checked as nextword.mix.load_mix checks it (every field, each part's size and
 * SHA-256, the parts' text rules) and its parts are opened relative to its folder. */
NW_API nw_status nw_open(const char *path, nw_model **out, nw_error *err);
/* nw_open with flags: NW_OPEN_SKIP_PART_DIGESTS opens a mixture without reading its parts for
 * their SHA-256 (their sizes are still checked), as load_mix(path, verify_parts=False): for an
 * app that verified the files once (e.g. after download) and opens them at every start. */
#define NW_OPEN_SKIP_PART_DIGESTS 1u
NW_API nw_status nw_open_ex(const char *path, unsigned flags, nw_model **out, nw_error *err);
/* Unmap and free; NULL is allowed. No session of the model may be in use. */
NW_API void nw_close(nw_model *model);
NW_API nw_status nw_info_get(const nw_model *model, nw_info *out);

/* Per-thread query scratch bound to one model. */
NW_API nw_status nw_session_new(const nw_model *model, nw_session **out, nw_error *err);
NW_API void nw_session_free(nw_session *session);

/*
 * The k words the user most likely wants at the end of `text` (UTF-8, `len` bytes),
 * best first, exactly as Model.suggest: a partial word at the end is completed, else the
 * next word is predicted; words are recased as typed. Writes up to k entries to `out`
 * (room for k), their spellings to `buf` (NUL-terminated each), the count to `*n_out`.
 * 64 bytes per suggestion of `buf` always suffice for keys of up to 16 characters;
 * NW_E_BUFFER says it was too small.
 */
NW_API nw_status nw_suggest(nw_session *s, const char *text, size_t len, int k, nw_suggestion *out, size_t *n_out,
                     char *buf, size_t buf_size, nw_error *err);

/*
 * P(word | history): `history` holds the context tokens oldest first (NULL or "<s>" = a
 * sentence start, "<unk>" = after a number or symbol), as Model.prob_after. `word` may be
 * "</s>" (end of sentence) or "<unk>"; a word outside the vocabulary gets <unk>'s
 * probability. Words are case-insensitive.
 */
NW_API nw_status nw_prob(nw_session *s, const char *word, const char *const *history, size_t n_history, double *out,
                  nw_error *err);

/* ---- helpers a mixture uses, exposed for tests ------------------------------------------ */

/* The correctly rounded sum of x[0..n) (as Python's math.fsum); NW_E_ARG on a non-finite
 * input or an intermediate overflow. */
NW_API nw_status nw_exact_sum(const double *x, size_t n, double *out);
/* SHA-256 (FIPS 180-4) of len bytes. */
NW_API void nw_sha256(const void *data, size_t len, uint8_t out[32]);

/* A stable name for a status ("NW_E_FORMAT", ...). */
NW_API const char *nw_status_name(nw_status status);

/* ---- text rules, exposed for tests and for callers that cut text themselves ---------- */

/* key(word) of docs/FORMAT.md §9.1 (NFC(casefold(word)) with ’ → ' and ‐ ‑ → -) into out.
 * (A helper, not a query: it allocates a scratch buffer.) */
NW_API nw_status nw_fold(const char *word, size_t len, char *out, size_t cap, size_t *out_len);

/* What parse_typed finds at the end of text: kinds 0 = word (span of the NFC tail in
 * `tail`), 1 = <s>, 2 = <unk>, 3 = none (`before` only). Spans are byte ranges of `tail`. */
typedef struct nw_parsed {
    int previous_kind, before_kind;
    size_t previous_off, previous_len, before_off, before_len, prefix_off, prefix_len;
    char tail[4352];   /* the examined tail, NFC, UTF-8 */
    size_t tail_len;
} nw_parsed;
NW_API nw_status nw_parse_typed(const char *text, size_t len, nw_parsed *out);

/* Character classes of one code point, as Python's str methods and `re` see them. */
enum {
    NW_CC_ALNUM = 1, NW_CC_DECIMAL = 2, NW_CC_SPACE = 4, NW_CC_PUNCT = 8,
    NW_CC_LOWER = 16, NW_CC_UPPER = 32, NW_CC_TITLE = 64, NW_CC_SENTENCE_END = 128
};
NW_API unsigned nw_char_class(uint32_t cp);
/* Python's str.upper() of one code point: writes up to 3 code points, returns how many. */
NW_API int nw_char_upper(uint32_t cp, uint32_t out[3]);
/* The Unicode version of utf8proc (NFC, case folding, categories). */
NW_API const char *nw_unicode_version(void);

#ifdef __cplusplus
}
#endif
#endif
