// The vocabulary trie through libmarisa (docs/FORMAT.md §7.2): C++ inside, a C API outside.
// Every call catches marisa's exceptions; nothing here allocates per query once a cursor
// (marisa::Agent) has been used once (its key buffer keeps its capacity).
#include <marisa.h>

#include <new>

#include "internal.h"

extern "C" {

void *nw_trie_map(const void *ptr, size_t len, size_t *n_keys) {
    marisa::Trie *t = new (std::nothrow) marisa::Trie();
    if (t == NULL) return NULL;
    try {
        t->map(ptr, len);
        *n_keys = t->num_keys();
    } catch (...) {
        delete t;
        return NULL;
    }
    return t;
}

void nw_trie_free(void *trie) { delete static_cast<marisa::Trie *>(trie); }

void *nw_cursor_new(void) {
    marisa::Agent *a = new (std::nothrow) marisa::Agent();
    if (a == NULL) return NULL;
    try {
        a->set_query(static_cast<std::size_t>(0));
        a->init_state();  // allocate the cursor's state now, not during a query
    } catch (...) {
        delete a;
        return NULL;
    }
    return a;
}

void nw_cursor_free(void *cursor) { delete static_cast<marisa::Agent *>(cursor); }

long long nw_trie_lookup(const void *trie, void *cursor, const char *key, size_t len) {
    const marisa::Trie *t = static_cast<const marisa::Trie *>(trie);
    marisa::Agent *a = static_cast<marisa::Agent *>(cursor);
    try {
        a->set_query(key, len);
        if (!t->lookup(*a)) return -1;
        return static_cast<long long>(a->key().id());
    } catch (...) {
        return -2;
    }
}

int nw_trie_restore(const void *trie, void *cursor, size_t key_id, const char **key, size_t *len) {
    const marisa::Trie *t = static_cast<const marisa::Trie *>(trie);
    marisa::Agent *a = static_cast<marisa::Agent *>(cursor);
    try {
        if (key_id >= t->num_keys()) return -1;
        a->set_query(key_id);
        t->reverse_lookup(*a);
        *key = a->key().ptr();
        *len = a->key().length();
        return 0;
    } catch (...) {
        return -1;
    }
}

}  // extern "C"
