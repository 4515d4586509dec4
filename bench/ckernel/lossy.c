/*
 * lossy.c - the C reference kernel for streamcount's benchmarks (a baseline, not part of
 * the package).
 *
 * What it does: reads integer baskets (one transaction per line, non-negative integer item
 * ids separated by spaces, tabs or commas; each line read as a set), cuts the stream into
 * count-based panes of `pane` transactions, keeps `window / pane` panes, and counts every
 * itemset of size 1..K (K <= 3) in each pane with Lossy Counting (Manku & Motwani, VLDB
 * 2002) and the Apriori pruning inside a batch, with the same rules as streamcount's
 * LossySummary.add_batch and Engine (count-based panes):
 *
 *   w = ceil(1/epsilon) (0: exact counting); batch = max(w, floor(batch/w) * w);
 *   a pane counts its transactions in batches of `batch`, the last one at the pane's end
 *   (or at the end of the input) holding the rest;
 *   a batch covers transactions N0+1..N1 of its pane: b0 = ceil(N0/w), b1 = ceil(N1/w),
 *   beta = b1 - b0;
 *   level by level (k = 1..K), an itemset is counted in the batch only when every subset one
 *   item smaller is tracked after level k-1 was updated for this batch; a tracked itemset with
 *   an untracked subset is dropped; a tracked itemset gains its batch count c (f += c) and is
 *   dropped when f + delta <= b1; an untracked one becomes (c, b0) when c >= beta + 1 (the
 *   deletion test applied at once). With epsilon 0 nothing is dropped.
 *
 * Data structures: one open-addressing hash table (linear probing, Fibonacci hashing of the
 * packed key) per pane and itemset size for the summary, rebuilt at every batch; one
 * open-addressing table counting the k-itemsets of the current batch (keys counted in blocks,
 * each slot prefetched a few keys ahead); a dense array counting the single items of the
 * batch. Itemsets are packed into a uint64 key, 21 bits per item, so item ids must be below
 * 2^21. Baskets with more than 200 distinct items (-x) are set aside, as the Engine's default
 * max_basket_items does. One thread, plain C11 (the prefetch hint is a GCC/Clang builtin,
 * left out elsewhere), no dependencies.
 *
 * Usage: lossy [options] FILE        (lossy -h lists the options)
 *
 * Modes: `time` prints one JSON object with the seconds and orders of parse-only (read the
 * file and turn it into integer arrays), count-only (the windowed counting over integer
 * arrays parsed beforehand) and end-to-end (read + parse + count); `dump` runs end to end
 * and prints the entries of the live panes:
 *
 *   pane <index> n <transactions> tracked <entries of size 1> [<size 2> [<size 3>]]
 *   <k> <f> <delta> <item> ...                       (one line per tracked itemset)
 *
 * At the end of the input the open pane's buffered transactions are counted as one last
 * (partial) batch, like Engine.flush().
 */
#define _POSIX_C_SOURCE 199309L
#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#define ITEM_BITS 21
#define ITEM_LIMIT (1u << ITEM_BITS) /* item ids must be below this */
#define ITEM_MASK ((uint64_t)ITEM_LIMIT - 1)
#define EMPTY_KEY UINT64_MAX /* never a packed itemset (at most 63 bits) */
#define MAX_K 3
#define MIN_LG 4

static void die(const char *fmt, ...) {
    va_list ap;
    va_start(ap, fmt);
    fputs("lossy: ", stderr);
    vfprintf(stderr, fmt, ap);
    fputc('\n', stderr);
    va_end(ap);
    exit(2);
}

static void *xmalloc(size_t n) {
    void *p = malloc(n ? n : 1);
    if (!p) die("out of memory (%zu bytes)", n);
    return p;
}

static void *xrealloc(void *p, size_t n) {
    p = realloc(p, n ? n : 1);
    if (!p) die("out of memory (%zu bytes)", n);
    return p;
}

static double now_seconds(void) {
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

/* ---- packed itemsets ------------------------------------------------------------------- */

static inline uint64_t pack2(uint32_t a, uint32_t b) { return ((uint64_t)a << ITEM_BITS) | b; }

static inline uint64_t pack3(uint32_t a, uint32_t b, uint32_t c) {
    return ((uint64_t)a << (2 * ITEM_BITS)) | ((uint64_t)b << ITEM_BITS) | c;
}

static void unpack(uint64_t key, int k, uint32_t *out) {
    for (int j = k - 1; j >= 0; j--) {
        out[j] = (uint32_t)(key & ITEM_MASK);
        key >>= ITEM_BITS;
    }
}

static inline size_t slot_of(uint64_t key, int lg) {
    return (size_t)((key * 0x9E3779B97F4A7C15ULL) >> (64 - lg));
}

static int lg_for(size_t entries) { /* capacity with load <= 1/2 */
    int lg = MIN_LG;
    while (((size_t)1 << lg) < 2 * entries) lg++;
    return lg;
}

/* ---- summary table: tracked itemsets of one size with (f, delta) ------------------------ */

typedef struct {
    uint64_t key; /* EMPTY_KEY: a free slot */
    uint32_t f, d;
} Entry;

typedef struct {
    Entry *slot;
    size_t cap, n;
    int lg;
} Table;

static void table_reset(Table *t, size_t entries) {
    int lg = lg_for(entries);
    size_t cap = (size_t)1 << lg;
    if (cap > t->cap || cap * 8 < t->cap) {
        free(t->slot);
        t->slot = xmalloc(cap * sizeof *t->slot);
        t->cap = cap;
        t->lg = lg;
    }
    for (size_t s = 0; s < t->cap; s++) t->slot[s].key = EMPTY_KEY;
    t->n = 0;
}

static void table_free(Table *t) {
    free(t->slot);
    memset(t, 0, sizeof *t);
}

static inline int table_has(const Table *t, uint64_t key) {
    if (t->n == 0) return 0;
    size_t mask = t->cap - 1;
    for (size_t s = slot_of(key, t->lg);; s = (s + 1) & mask) {
        uint64_t k = t->slot[s].key;
        if (k == key) return 1;
        if (k == EMPTY_KEY) return 0;
    }
}

/* the caller guarantees the key is absent and the capacity suffices */
static inline void table_put(Table *t, uint64_t key, uint32_t f, uint32_t d) {
    size_t mask = t->cap - 1;
    size_t s = slot_of(key, t->lg);
    while (t->slot[s].key != EMPTY_KEY) s = (s + 1) & mask;
    t->slot[s].key = key;
    t->slot[s].f = f;
    t->slot[s].d = d;
    t->n++;
}

/* ---- batch counting table: k-itemsets of the current batch with their counts ----------- */

typedef struct {
    uint64_t key; /* EMPTY_KEY: a free slot */
    uint64_t c;
} Cell;

typedef struct {
    Cell *slot;
    size_t cap, n;
    int lg;
    uint64_t min_new; /* batch count from which an untracked itemset is inserted */
    size_t fresh;     /* keys whose count reached min_new (an upper bound on insertions) */
} Counts;

static void counts_clear(Counts *t) {
    for (size_t s = 0; s < t->cap; s++) t->slot[s].key = EMPTY_KEY;
    t->n = 0;
}

static void counts_alloc(Counts *t, int lg) {
    t->lg = lg;
    t->cap = (size_t)1 << lg;
    t->slot = xmalloc(t->cap * sizeof *t->slot);
    counts_clear(t);
}

static void counts_grow(Counts *t) {
    Counts old = *t;
    counts_alloc(t, old.lg + 1);
    size_t mask = t->cap - 1;
    for (size_t i = 0; i < old.cap; i++) {
        if (old.slot[i].key == EMPTY_KEY) continue;
        size_t s = slot_of(old.slot[i].key, t->lg);
        while (t->slot[s].key != EMPTY_KEY) s = (s + 1) & mask;
        t->slot[s] = old.slot[i];
    }
    t->n = old.n;
    free(old.slot);
}

/* Keys are counted in blocks: the slot of each key is computed and prefetched PREFETCH keys
 * ahead of its increment, so several cache misses are in flight at once (the table of a
 * batch is larger than the L2 cache). */
#define KEY_BLOCK 1024
#define PREFETCH 16
#if defined(__GNUC__)
#define PREFETCH_RW(p) __builtin_prefetch((p), 1, 1)
#else
#define PREFETCH_RW(p) ((void)(p))
#endif

typedef struct {
    uint64_t key[KEY_BLOCK];
    size_t slot[KEY_BLOCK];
    size_t n;
} KeyBlock;

static void counts_add_block(Counts *t, KeyBlock *kb) {
    size_t n = kb->n;
    while ((t->n + n) * 2 > t->cap) counts_grow(t);
    for (size_t i = 0; i < n; i++) kb->slot[i] = slot_of(kb->key[i], t->lg);
    size_t mask = t->cap - 1;
    for (size_t i = 0; i < n; i++) {
        if (i + PREFETCH < n) PREFETCH_RW(&t->slot[kb->slot[i + PREFETCH]]);
        uint64_t key = kb->key[i];
        size_t s = kb->slot[i];
        for (;;) {
            uint64_t k = t->slot[s].key;
            if (k == key) {
                t->fresh += ++t->slot[s].c == t->min_new;
                break;
            }
            if (k == EMPTY_KEY) {
                t->slot[s].key = key;
                t->slot[s].c = 1;
                t->n++;
                t->fresh += t->min_new <= 1;
                break;
            }
            s = (s + 1) & mask;
        }
    }
    kb->n = 0;
}

static inline void block_push(Counts *t, KeyBlock *kb, uint64_t key) {
    kb->key[kb->n++] = key;
    if (kb->n == KEY_BLOCK) counts_add_block(t, kb);
}

/* count of `key` in this batch, which is then marked as taken by a tracked entry (0) */
static inline uint64_t counts_take(Counts *t, uint64_t key) {
    if (t->n == 0) return 0;
    size_t mask = t->cap - 1;
    for (size_t s = slot_of(key, t->lg);; s = (s + 1) & mask) {
        uint64_t k = t->slot[s].key;
        if (k == key) {
            uint64_t c = t->slot[s].c;
            t->slot[s].c = 0;
            return c;
        }
        if (k == EMPTY_KEY) return 0;
    }
}

/* ---- transactions in CSR form ---------------------------------------------------------- */

typedef struct {
    uint32_t *items; /* ascending, distinct ids within each transaction */
    uint32_t *len;   /* items per transaction */
    size_t n_items, n_txn, cap_items, cap_txn;
    uint32_t max_len;
} Baskets;

static void baskets_clear(Baskets *b) {
    b->n_items = b->n_txn = 0;
    b->max_len = 0;
}

static void baskets_free(Baskets *b) {
    free(b->items);
    free(b->len);
    memset(b, 0, sizeof *b);
}

static void baskets_reserve(Baskets *b, size_t items, size_t txn) {
    if (items > b->cap_items) {
        size_t cap = b->cap_items ? b->cap_items : 1024;
        while (cap < items) cap *= 2;
        b->items = xrealloc(b->items, cap * sizeof *b->items);
        b->cap_items = cap;
    }
    if (txn > b->cap_txn) {
        size_t cap = b->cap_txn ? b->cap_txn : 256;
        while (cap < txn) cap *= 2;
        b->len = xrealloc(b->len, cap * sizeof *b->len);
        b->cap_txn = cap;
    }
}

/* keep only the first `n` transactions (0: all) */
static void baskets_truncate(Baskets *b, uint64_t n) {
    if (n == 0 || b->n_txn <= n) return;
    size_t items = 0;
    uint32_t max_len = 0;
    for (size_t t = 0; t < n; t++) {
        items += b->len[t];
        if (b->len[t] > max_len) max_len = b->len[t];
    }
    b->n_txn = n;
    b->n_items = items;
    b->max_len = max_len;
}

static void baskets_push(Baskets *b, const uint32_t *items, uint32_t len) {
    baskets_reserve(b, b->n_items + len, b->n_txn + 1);
    memcpy(b->items + b->n_items, items, len * sizeof *items);
    b->n_items += len;
    b->len[b->n_txn++] = len;
    if (len > b->max_len) b->max_len = len;
}

/* ---- parsing ---------------------------------------------------------------------------- */

typedef struct {
    char *data;
    size_t size, cap;
} Text;

static void read_file(const char *path, Text *t) {
    FILE *fh = fopen(path, "rb");
    if (!fh) die("cannot open %s: %s", path, strerror(errno));
    t->size = 0;
    for (;;) {
        if (t->cap - t->size < 1 << 20) {
            t->cap = t->cap ? 2 * t->cap : 1 << 22;
            t->data = xrealloc(t->data, t->cap);
        }
        size_t got = fread(t->data + t->size, 1, t->cap - t->size, fh);
        t->size += got;
        if (got == 0) break;
    }
    if (ferror(fh)) die("cannot read %s", path);
    fclose(fh);
}

/* Whole text -> CSR: each line one transaction, ids sorted and de-duplicated; lines without
 * items are skipped. `path` names the file in error messages. */
static void parse_text(const Text *t, const char *path, Baskets *out) {
    baskets_clear(out);
    baskets_reserve(out, t->size / 2 + 16, t->size / 8 + 16);
    const unsigned char *p = (const unsigned char *)t->data;
    const unsigned char *end = p + t->size;
    long long line = 1;
    while (p < end) {
        /* a line of the rest holds at most (rest + 1) / 2 ids */
        size_t room = out->n_items + (size_t)(end - p) / 2 + 1;
        if (room > out->cap_items || out->n_txn + 1 > out->cap_txn)
            baskets_reserve(out, room, out->n_txn + 1);
        uint32_t *row = out->items + out->n_items;
        uint32_t len = 0;
        int sorted = 1;
        while (p < end && *p != '\n') {
            unsigned ch = *p;
            if (ch - '0' < 10u) {
                uint64_t v = 0;
                do {
                    v = v * 10 + (*p - '0');
                    if (v >= ITEM_LIMIT)
                        die("%s line %lld: item id too large (the kernel packs ids below 2^21)",
                            path, line);
                    p++;
                } while (p < end && (unsigned)(*p - '0') < 10u);
                if (len && (uint32_t)v <= row[len - 1]) sorted = 0;
                row[len++] = (uint32_t)v;
            } else if (ch == ' ' || ch == '\t' || ch == '\r' || ch == ',') {
                p++;
            } else {
                die("%s line %lld: not a non-negative integer item id", path, line);
            }
        }
        if (p < end) p++; /* the newline */
        line++;
        if (!sorted) { /* insertion sort, then drop repeats */
            for (uint32_t i = 1; i < len; i++) {
                uint32_t v = row[i], j = i;
                while (j && row[j - 1] > v) {
                    row[j] = row[j - 1];
                    j--;
                }
                row[j] = v;
            }
            uint32_t m = 0;
            for (uint32_t i = 0; i < len; i++)
                if (m == 0 || row[i] != row[m - 1]) row[m++] = row[i];
            len = m;
        }
        if (len == 0) continue;
        out->n_items += len;
        out->len[out->n_txn++] = len;
        if (len > out->max_len) out->max_len = len;
    }
}

/* ---- panes and the engine --------------------------------------------------------------- */

typedef struct {
    Table lv[MAX_K];
    uint64_t n;  /* transactions counted */
    long long index; /* pane number, (seq - 1) / pane_size; -1 while unused */
} Pane;

typedef struct {
    /* settings */
    int k;
    uint64_t w, pane_size, batch_size, max_basket;
    int window_panes;
    /* state */
    Pane *ring; /* pane i lives in ring[i % window_panes] */
    long long open_index;
    uint64_t seq, rejected;
    Baskets buf; /* transactions of the open pane not counted yet */
    /* scratch */
    uint32_t *icnt, *touched, *row;
    uint8_t *flag, *ok;
    size_t row_cap;
    Counts cnt;
    KeyBlock block;
    Table spare[MAX_K]; /* a summary level is rebuilt here, then swapped in */
} Engine;

static void engine_init(Engine *e, double epsilon, int k, uint64_t window, uint64_t pane,
                        uint64_t batch, uint64_t max_basket) {
    memset(e, 0, sizeof *e);
    if (!(epsilon >= 0 && epsilon < 1))
        die("epsilon %g must be in [0, 1) (0 counts exactly)", epsilon);
    if (k < 1 || k > MAX_K) die("K = %d: must be 1, 2 or 3", k);
    if (pane < 1 || window < pane || window % pane)
        die("window %llu must be a positive multiple of the pane size %llu",
            (unsigned long long)window, (unsigned long long)pane);
    if (pane >= ((uint64_t)1 << 31))
        die("pane size %llu must be below 2^31", (unsigned long long)pane);
    if (batch < 1) die("batch size must be >= 1");
    e->k = k;
    e->w = epsilon == 0 ? 0 : (uint64_t)ceil(1.0 / epsilon - 1e-12);
    e->batch_size = e->w ? (batch / e->w) * e->w : batch;
    if (e->batch_size < e->w) e->batch_size = e->w;
    e->pane_size = pane;
    e->window_panes = (int)(window / pane);
    e->max_basket = max_basket;
    e->ring = xmalloc((size_t)e->window_panes * sizeof *e->ring);
    memset(e->ring, 0, (size_t)e->window_panes * sizeof *e->ring);
    for (int i = 0; i < e->window_panes; i++) e->ring[i].index = -1;
    e->open_index = -1;
    e->icnt = xmalloc(ITEM_LIMIT * sizeof *e->icnt);
    memset(e->icnt, 0, ITEM_LIMIT * sizeof *e->icnt);
    e->flag = xmalloc(ITEM_LIMIT);
    memset(e->flag, 0, ITEM_LIMIT);
    e->touched = xmalloc(ITEM_LIMIT * sizeof *e->touched);
    counts_alloc(&e->cnt, 16);
}

static void engine_free(Engine *e) {
    for (int i = 0; i < e->window_panes; i++)
        for (int j = 0; j < MAX_K; j++) table_free(&e->ring[i].lv[j]);
    free(e->ring);
    baskets_free(&e->buf);
    free(e->icnt);
    free(e->flag);
    free(e->touched);
    free(e->row);
    free(e->ok);
    free(e->cnt.slot);
    for (int j = 0; j < MAX_K; j++) table_free(&e->spare[j]);
}

static void ensure_row(Engine *e, uint32_t len) {
    if (len <= e->row_cap) return;
    e->row_cap = len;
    e->row = xrealloc(e->row, len * sizeof *e->row);
    e->ok = xrealloc(e->ok, (size_t)len * len);
}

/* Level 1: every item of the batch is counted (dense array). */
static void update_singles(Engine *e, Table *lv, const Baskets *b, uint64_t b0, uint64_t b1,
                           uint64_t min_new, int exact) {
    size_t n_touched = 0;
    for (size_t i = 0; i < b->n_items; i++) {
        uint32_t id = b->items[i];
        if (e->icnt[id]++ == 0) e->touched[n_touched++] = id;
    }
    size_t fresh = 0;
    for (size_t i = 0; i < n_touched; i++) fresh += e->icnt[e->touched[i]] >= min_new;
    Table *nt = &e->spare[0];
    table_reset(nt, lv->n + fresh);
    for (size_t s = 0; s < lv->cap && lv->n; s++) {
        uint64_t key = lv->slot[s].key;
        if (key == EMPTY_KEY) continue;
        uint64_t f = lv->slot[s].f + (uint64_t)e->icnt[key];
        e->icnt[key] = 0; /* taken by a tracked entry */
        if (exact || f + lv->slot[s].d > b1) table_put(nt, key, (uint32_t)f, lv->slot[s].d);
    }
    for (size_t i = 0; i < n_touched; i++) {
        uint32_t id = e->touched[i];
        if (e->icnt[id] >= min_new) table_put(nt, id, e->icnt[id], (uint32_t)b0);
        e->icnt[id] = 0;
    }
    Table tmp = *lv;
    *lv = *nt;
    *nt = tmp;
}

/* Are all (k-1)-subsets of a tracked k-itemset tracked now? (flag bit 1: tracked item) */
static inline int subsets_tracked(const Engine *e, const Table *prev, int k, uint64_t key) {
    uint32_t it[MAX_K];
    unpack(key, k, it);
    if (k == 2) return (e->flag[it[0]] & 1) && (e->flag[it[1]] & 1);
    return table_has(prev, pack2(it[0], it[1])) && table_has(prev, pack2(it[0], it[2])) &&
           table_has(prev, pack2(it[1], it[2]));
}

/* Levels k >= 2: merge the batch counts (e->cnt) into the tracked entries `lv`. */
static void merge_level(Engine *e, Table *lv, const Table *prev, int k, uint64_t b0, uint64_t b1,
                        uint64_t min_new, int exact) {
    Counts *c = &e->cnt;
    Table *nt = &e->spare[k - 1];
    table_reset(nt, lv->n + c->fresh);
    for (size_t s = 0; s < lv->cap && lv->n; s++) {
        uint64_t key = lv->slot[s].key;
        if (key == EMPTY_KEY) continue;
        if (!subsets_tracked(e, prev, k, key)) continue; /* true count <= the subset's */
        uint64_t f = lv->slot[s].f + (uint64_t)counts_take(c, key);
        if (exact || f + lv->slot[s].d > b1) table_put(nt, key, (uint32_t)f, lv->slot[s].d);
    }
    /* one pass over the batch table: insert what qualifies, leave the table empty */
    if (c->n) {
        for (size_t s = 0; s < c->cap; s++) {
            if (c->slot[s].key == EMPTY_KEY) continue;
            if (c->slot[s].c >= min_new)
                table_put(nt, c->slot[s].key, (uint32_t)c->slot[s].c, (uint32_t)b0);
            c->slot[s].key = EMPTY_KEY;
        }
        if (c->n * 16 < c->cap && c->lg > 16) { /* far too large for this stream now */
            free(c->slot);
            counts_alloc(c, c->lg - 1);
        }
        c->n = 0;
    }
    Table tmp = *lv;
    *lv = *nt;
    *nt = tmp;
}

static void count_pairs(Engine *e, const Baskets *b) {
    const uint32_t *items = b->items;
    uint32_t *row = e->row;
    for (size_t t = 0; t < b->n_txn; t++) {
        uint32_t len = b->len[t], m = 0;
        for (uint32_t i = 0; i < len; i++)
            if (e->flag[items[i]] & 1) row[m++] = items[i];
        items += len;
        for (uint32_t i = 0; i + 1 < m; i++) {
            uint64_t hi = (uint64_t)row[i] << ITEM_BITS;
            for (uint32_t j = i + 1; j < m; j++) block_push(&e->cnt, &e->block, hi | row[j]);
        }
    }
    counts_add_block(&e->cnt, &e->block);
}

static void count_triples(Engine *e, const Baskets *b, const Table *pairs) {
    const uint32_t *items = b->items;
    uint32_t *row = e->row;
    uint8_t *ok = e->ok;
    for (size_t t = 0; t < b->n_txn; t++) {
        uint32_t len = b->len[t], m = 0;
        for (uint32_t i = 0; i < len; i++)
            if (e->flag[items[i]] & 2) row[m++] = items[i];
        items += len;
        if (m < 3) continue;
        for (uint32_t i = 0; i + 1 < m; i++)
            for (uint32_t j = i + 1; j < m; j++)
                ok[i * m + j] = (uint8_t)table_has(pairs, pack2(row[i], row[j]));
        for (uint32_t i = 0; i + 2 < m; i++)
            for (uint32_t j = i + 1; j + 1 < m; j++) {
                if (!ok[i * m + j]) continue;
                for (uint32_t l = j + 1; l < m; l++)
                    if (ok[i * m + l] && ok[j * m + l])
                        block_push(&e->cnt, &e->block, pack3(row[i], row[j], row[l]));
            }
    }
    counts_add_block(&e->cnt, &e->block);
}

static void set_flags(Engine *e, const Table *lv, int k, uint8_t bit, int on) {
    uint32_t it[MAX_K];
    for (size_t s = 0; s < lv->cap && lv->n; s++) {
        uint64_t key = lv->slot[s].key;
        if (key == EMPTY_KEY) continue;
        unpack(key, k, it);
        for (int j = 0; j < k; j++) {
            if (on)
                e->flag[it[j]] |= bit;
            else
                e->flag[it[j]] &= (uint8_t)~bit;
        }
    }
}

/* One batch of `b` into pane `p`: LossySummary.add_batch. */
static void count_batch(Engine *e, Pane *p, const Baskets *b) {
    if (b->n_txn == 0) return;
    uint64_t n0 = p->n, n1 = p->n + b->n_txn;
    uint64_t b0 = 0, b1 = 0;
    if (e->w) {
        b0 = (n0 + e->w - 1) / e->w;
        b1 = (n1 + e->w - 1) / e->w;
    }
    uint64_t min_new = b1 - b0 + 1;
    int exact = e->w == 0;
    p->n = n1;
    ensure_row(e, b->max_len);
    update_singles(e, &p->lv[0], b, b0, b1, min_new, exact);
    if (e->k == 1) return;
    set_flags(e, &p->lv[0], 1, 1, 1);
    e->cnt.min_new = min_new;
    e->cnt.fresh = 0;
    count_pairs(e, b);
    merge_level(e, &p->lv[1], &p->lv[0], 2, b0, b1, min_new, exact);
    if (e->k == 3) {
        set_flags(e, &p->lv[1], 2, 2, 1);
        e->cnt.fresh = 0;
        count_triples(e, b, &p->lv[1]);
        merge_level(e, &p->lv[2], &p->lv[1], 3, b0, b1, min_new, exact);
        set_flags(e, &p->lv[1], 2, 2, 0);
    }
    set_flags(e, &p->lv[0], 1, 1, 0);
}

static Pane *open_pane(Engine *e, long long index) {
    Pane *p = &e->ring[index % e->window_panes]; /* the pane leaving the window, if any */
    for (int j = 0; j < e->k; j++) table_reset(&p->lv[j], 0);
    p->n = 0;
    p->index = index;
    e->open_index = index;
    return p;
}

static void count_buffer(Engine *e) {
    if (e->buf.n_txn == 0) return;
    count_batch(e, &e->ring[e->open_index % e->window_panes], &e->buf);
    baskets_clear(&e->buf);
}

/* Engine.add for one transaction (ascending distinct ids), count-based panes. */
static inline void engine_push(Engine *e, const uint32_t *items, uint32_t len) {
    if (len == 0 || (e->max_basket && len > e->max_basket)) {
        e->rejected++;
        return;
    }
    long long index = (long long)(e->seq / e->pane_size);
    if (index != e->open_index) open_pane(e, index);
    baskets_push(&e->buf, items, len);
    e->seq++;
    if (e->buf.n_txn == e->batch_size) count_buffer(e);
    if (e->seq % e->pane_size == 0) count_buffer(e); /* the pane closes */
}

static void engine_feed(Engine *e, const Baskets *b) {
    const uint32_t *items = b->items;
    for (size_t t = 0; t < b->n_txn; t++) {
        engine_push(e, items, b->len[t]);
        items += b->len[t];
    }
}

static void engine_flush(Engine *e) { count_buffer(e); }

static void engine_tracked(const Engine *e, uint64_t *out) {
    for (int j = 0; j < MAX_K; j++) out[j] = 0;
    for (int i = 0; i < e->window_panes; i++)
        if (e->ring[i].index >= 0)
            for (int j = 0; j < e->k; j++) out[j] += e->ring[i].lv[j].n;
}

/* ---- output ------------------------------------------------------------------------------ */

static void dump_panes(const Engine *e, long long only) {
    uint32_t it[MAX_K];
    for (long long idx = e->open_index - e->window_panes + 1; idx <= e->open_index; idx++) {
        if (idx < 0 || (only >= 0 && idx != only)) continue;
        const Pane *p = &e->ring[idx % e->window_panes];
        if (p->index != idx) continue;
        printf("pane %lld n %llu tracked", idx, (unsigned long long)p->n);
        for (int j = 0; j < e->k; j++) printf(" %zu", p->lv[j].n);
        putchar('\n');
        for (int j = 0; j < e->k; j++) {
            const Table *t = &p->lv[j];
            for (size_t s = 0; s < t->cap && t->n; s++) {
                if (t->slot[s].key == EMPTY_KEY) continue;
                unpack(t->slot[s].key, j + 1, it);
                printf("%d %u %u", j + 1, t->slot[s].f, t->slot[s].d);
                for (int q = 0; q <= j; q++) printf(" %u", it[q]);
                putchar('\n');
            }
        }
    }
}

static void usage(FILE *out) {
    fputs("usage: lossy [options] FILE\n"
          "  -m MODE    time (parse-only, count-only, end-to-end; JSON) or dump (entries)\n"
          "             [time]\n"
          "  -e EPS     epsilon in [0, 1), 0 counts exactly [0.001]\n"
          "  -k K       largest itemset size, 1..3 [2]\n"
          "  -p N       pane size in transactions [5000]\n"
          "  -w N       window size in transactions, a multiple of the pane size [50000]\n"
          "  -b N       batch size, rounded down to whole buckets of ceil(1/EPS) [5000]\n"
          "  -r N       feed the file N times over [1]\n"
          "  -x N       set aside baskets with more than N distinct items, 0: none [200]\n"
          "  -n N       read only the first N transactions of the file, 0: all [0]\n"
          "  -P INDEX   dump only this pane (default: every live pane)\n",
          out);
}

static uint64_t parse_count(const char *s, const char *opt) {
    char *end;
    errno = 0;
    unsigned long long v = strtoull(s, &end, 10);
    if (errno || *end || !*s || s[0] == '-')
        die("option %s needs a non-negative integer, got '%s'", opt, s);
    return (uint64_t)v;
}

int main(int argc, char **argv) {
    const char *mode = "time", *path = NULL;
    double epsilon = 0.001;
    int k = 2;
    uint64_t pane = 5000, window = 50000, batch = 5000, repeat = 1, max_basket = 200, head = 0;
    long long only = -1;
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i];
        if (!strcmp(a, "-h") || !strcmp(a, "--help")) {
            usage(stdout);
            return 0;
        }
        if (a[0] == '-' && a[1] && !a[2] && i + 1 < argc) {
            const char *v = argv[++i];
            switch (a[1]) {
            case 'm': mode = v; break;
            case 'e': {
                char *end;
                epsilon = strtod(v, &end);
                if (*end || !*v) die("option %s needs a number, got '%s'", a, v);
                break;
            }
            case 'k': k = (int)parse_count(v, a); break;
            case 'p': pane = parse_count(v, a); break;
            case 'w': window = parse_count(v, a); break;
            case 'b': batch = parse_count(v, a); break;
            case 'r': repeat = parse_count(v, a); break;
            case 'x': max_basket = parse_count(v, a); break;
            case 'n': head = parse_count(v, a); break;
            case 'P': only = (long long)parse_count(v, a); break;
            default: usage(stderr); return 2;
            }
        } else if (a[0] != '-' && !path) {
            path = a;
        } else {
            usage(stderr);
            return 2;
        }
    }
    if (!path) {
        usage(stderr);
        return 2;
    }
    if (repeat < 1) die("option -r must be >= 1");
    Text text = {0};
    Baskets parsed = {0};
    Engine e;

    if (!strcmp(mode, "dump")) {
        engine_init(&e, epsilon, k, window, pane, batch, max_basket);
        for (uint64_t r = 0; r < repeat; r++) {
            read_file(path, &text);
            parse_text(&text, path, &parsed);
            baskets_truncate(&parsed, head);
            engine_feed(&e, &parsed);
        }
        engine_flush(&e);
        dump_panes(&e, only);
    } else if (!strcmp(mode, "time")) {
        uint64_t tracked_count[MAX_K], tracked_e2e[MAX_K];
        /* parse-only: read the file and turn it into integer arrays, `repeat` times */
        double t0 = now_seconds();
        uint64_t parse_orders = 0;
        for (uint64_t r = 0; r < repeat; r++) {
            read_file(path, &text);
            parse_text(&text, path, &parsed);
            baskets_truncate(&parsed, head);
            parse_orders += parsed.n_txn;
        }
        double parse_s = now_seconds() - t0;
        /* count-only: the parsed arrays fed `repeat` times through the panes */
        engine_init(&e, epsilon, k, window, pane, batch, max_basket);
        t0 = now_seconds();
        for (uint64_t r = 0; r < repeat; r++) engine_feed(&e, &parsed);
        engine_flush(&e);
        double count_s = now_seconds() - t0;
        uint64_t count_orders = e.seq, rejected = e.rejected;
        engine_tracked(&e, tracked_count);
        engine_free(&e);
        /* end-to-end: read + parse + count, `repeat` times, a fresh engine */
        engine_init(&e, epsilon, k, window, pane, batch, max_basket);
        t0 = now_seconds();
        for (uint64_t r = 0; r < repeat; r++) {
            read_file(path, &text);
            parse_text(&text, path, &parsed);
            baskets_truncate(&parsed, head);
            engine_feed(&e, &parsed);
        }
        engine_flush(&e);
        double e2e_s = now_seconds() - t0;
        uint64_t e2e_orders = e.seq;
        engine_tracked(&e, tracked_e2e);
        printf("{\"k\": %d, \"epsilon\": %.17g, \"bucket_width\": %llu, \"pane_size\": %llu, "
               "\"window_panes\": %d, \"batch_size\": %llu, \"repeat\": %llu, "
               "\"rejected\": %llu,\n",
               k, epsilon, (unsigned long long)e.w, (unsigned long long)pane, e.window_panes,
               (unsigned long long)e.batch_size, (unsigned long long)repeat,
               (unsigned long long)rejected);
        printf(" \"parse_seconds\": %.6f, \"parse_orders\": %llu,\n", parse_s,
               (unsigned long long)parse_orders);
        printf(" \"count_seconds\": %.6f, \"count_orders\": %llu,\n", count_s,
               (unsigned long long)count_orders);
        printf(" \"e2e_seconds\": %.6f, \"e2e_orders\": %llu,\n", e2e_s,
               (unsigned long long)e2e_orders);
        printf(" \"tracked_count\": [%llu, %llu, %llu], \"tracked_e2e\": [%llu, %llu, %llu]}\n",
               (unsigned long long)tracked_count[0], (unsigned long long)tracked_count[1],
               (unsigned long long)tracked_count[2], (unsigned long long)tracked_e2e[0],
               (unsigned long long)tracked_e2e[1], (unsigned long long)tracked_e2e[2]);
    } else {
        die("unknown mode '%s' (time or dump)", mode);
    }
    engine_free(&e);
    baskets_free(&parsed);
    free(text.data);
    return 0;
}
