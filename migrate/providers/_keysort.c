/* migrate.providers._keysort: the byte-wise order of a binary array's elements, compiled.
 *
 * RocksDB's default comparator orders keys byte-wise: unsigned bytes compared in turn, a key
 * that is a prefix of another first (common practice; the same order as Python's bytes). Every
 * sorted run written to RocksDB (migrate/providers/rocksdb_db.py:_write_run) needs its keys in
 * that order. Arrow's sort_indices gives it, and stays the reference and the fallback when this
 * extension is not built (it is optional, see setup.py); this module is a most-significant-first
 * radix sort of the same keys, faster on the keys the engine writes, whose first bytes (the
 * UnsafeRow null bits and field offsets, the RocksDB version byte) are shared by most keys.
 *
 * byte_order(offsets, data, offset, count, large) -> bytes
 *     offsets, data: the offsets and data buffers of an Arrow binary array (int32 offsets; int64
 *     when ``large``, for large_binary), any objects exporting contiguous buffers; offset, count:
 *     the array's slice (Array.offset, len(Array)). The array must have no nulls (the caller
 *     checks). Returns the int64 positions 0..count-1 in byte-wise order of their keys, in native
 *     byte order (Python reads it with numpy.frombuffer or as an Arrow int64 buffer). Equal keys
 *     are adjacent, in no particular order. Raises ValueError when the offsets are not those of
 *     a valid array over the data (decreasing, negative, past the end, buffer too short, an
 *     element of 2**31 bytes or more: open_binary in _binary.h), before sorting anything.
 *
 * last_of_each(offsets, data, offset, count, large) -> bytes
 *     The same arguments and checks. Returns the int64 position of the last occurrence of each
 *     distinct element, in byte-wise order of the elements: the replay of a heap-map snapshot
 *     and its deltas (migrate/providers/hdfs.py:resolve_versions), where the records of all files
 *     are one array in file order and the last write of a key wins. Equal keys are adjacent after
 *     the sort; each run's largest position is kept.
 *
 * last_in_file_order(offsets, data, offset, count, large) -> bytes
 *     The same arguments and checks (and count below 2**32 - 1). Returns the int64 position of
 *     the last occurrence of each distinct element in increasing order of position: the same
 *     replay when the rows may come in file order (an export, a convert to the heap map), by a
 *     hash table instead of a sort (see the function). Defined only when the system's libxxhash
 *     loads at import, for its XXH3_64bits.
 *
 * All three first check, in one pass that stops at the first pair out of order, whether the keys
 * already stand strictly increasing, and then sort nothing: a heap-map snapshot this tool wrote
 * from rows in key order (a convert or import to the heap map) is read back that way to prove it.
 * Measured on eight 156k-key partitions written from the 10M-key RocksDB benchmark checkpoint,
 * three alternating rounds: the heap-map read-back 0.164-0.202 -> 0.137 CPU us per row; the 10M
 * convert RocksDB -> heap map, four alternating pairs of whole commands, 8.65 -> 8.24 CPU s
 * (medians; benchmarks/results/2026-12-04-ab-presorted-replay.md). Keys in the engine's own file
 * order fail the check at their first or second pair.
 *
 * The sort: every key's next 8 bytes, from a depth shared by the group, read as one big-endian
 * number (zero-padded past the key's end), order the group by a least-significant-first radix
 * pass over those numbers (a byte position every key agrees on is skipped). Each run of equal
 * numbers is then split: the keys that end within those 8 bytes come first, ordered by length
 * (such a key is a prefix of every longer key of the run, or equal to a key of its length), and
 * the rest is a new group 8 bytes deeper. Groups of 32 or fewer keys are sorted by insertion with
 * memcmp. Groups wait on an explicit list, not the C stack, so long shared prefixes cannot
 * overflow it; every key takes part in at most length/8 + 1 groups, so the work is linear in the
 * bytes of the keys. The first level of more than 32 keys is different (first_level): it reads
 * the first 8 byte positions where the keys differ at all, in one pass over the keys as they lie
 * in memory, so the bytes every key shares cost one pass instead of a level each.
 *
 * Bounds: the offsets are all checked against the data's length before the sort, in 64-bit
 * arithmetic (open_binary, shared with _framing.c and _digest.c), and every read of a key stays
 * within its [start, end). The sort runs without the
 * GIL: it touches only the exported buffers and memory of its own (see _framing.c on why the
 * exported memory stays valid).
 */

#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <dlfcn.h>
#include <stdint.h>
#include <string.h>

#include "_binary.h"

#define SMALL_GROUP 32

typedef struct {
    uint64_t chunk;  /* 8 bytes of the key from the group's depth, big-endian, zero-padded */
    int64_t pos;     /* the key's position in the array */
} item_t;

typedef struct {
    int64_t lo, hi, depth;
} group_t;

/* The keys are one Arrow binary array, exported and checked by open_binary (_binary.h). */
typedef binary_t keys_t;

static inline int64_t
key_start(const keys_t *k, int64_t pos)
{
    return offset_at(k, pos);
}

static inline int64_t
key_end(const keys_t *k, int64_t pos)
{
    return offset_at(k, pos + 1);
}

static inline const unsigned char *
key_data(const keys_t *k)
{
    return (const unsigned char *)k->dv.buf;
}

/* Bytes [depth, depth + 8) of the key as a big-endian number, zero past its end. */
static inline uint64_t
chunk_at(const keys_t *k, int64_t pos, int64_t depth)
{
    int64_t start = key_start(k, pos) + depth, end = key_end(k, pos);
    int64_t have = end - start;
    const unsigned char *p = key_data(k) + start;
    uint64_t c = 0;
    if (have >= 8) {
        for (int j = 0; j < 8; j++)
            c = (c << 8) | p[j];
        return c;
    }
    for (int j = 0; j < 8; j++)
        c = (c << 8) | (j < have ? p[j] : 0);
    return c;
}

/* Byte-wise comparison of two keys that agree before depth (both at least depth long). */
static inline int
compare_from(const keys_t *k, int64_t a, int64_t b, int64_t depth)
{
    int64_t sa = key_start(k, a) + depth, sb = key_start(k, b) + depth;
    int64_t la = key_end(k, a) - sa, lb = key_end(k, b) - sb;
    int64_t m = la < lb ? la : lb;
    int c = m > 0 ? memcmp(key_data(k) + sa, key_data(k) + sb, (size_t)m) : 0;
    if (c)
        return c;
    return (la > lb) - (la < lb);
}

static void
insertion_sort(const keys_t *k, item_t *a, int64_t m, int64_t depth)
{
    for (int64_t i = 1; i < m; i++) {
        item_t x = a[i];
        int64_t j = i;
        while (j > 0 && compare_from(k, a[j - 1].pos, x.pos, depth) > 0) {
            a[j] = a[j - 1];
            j--;
        }
        a[j] = x;
    }
}

/* Order a[0..m) by chunk: least-significant byte first, one stable counting pass per byte,
 * skipping the bytes every item agrees on. t is scratch room for m items. */
static void
radix_by_chunk(item_t *a, item_t *t, int64_t m)
{
    static const int BYTES = 8;
    int64_t counts[8][256];
    memset(counts, 0, sizeof(counts));
    for (int64_t i = 0; i < m; i++) {
        uint64_t c = a[i].chunk;
        for (int b = 0; b < BYTES; b++)
            counts[b][(c >> (8 * b)) & 0xff]++;
    }
    item_t *src = a, *dst = t;
    for (int b = 0; b < BYTES; b++) {
        int64_t *cnt = counts[b];
        int same = 0;
        for (int v = 0; v < 256; v++) {
            if (cnt[v] == m) {
                same = 1;
                break;
            }
        }
        if (same)
            continue;
        int64_t at = 0;
        for (int v = 0; v < 256; v++) {
            int64_t n = cnt[v];
            cnt[v] = at;
            at += n;
        }
        for (int64_t i = 0; i < m; i++)
            dst[cnt[(src[i].chunk >> (8 * b)) & 0xff]++] = src[i];
        item_t *swap = src;
        src = dst;
        dst = swap;
    }
    if (src != a)
        memcpy(a, src, (size_t)m * sizeof(item_t));
}

/* Push a group; 0 on success, -1 when out of memory. */
static int
push(group_t **list, int64_t *len, int64_t *cap, int64_t lo, int64_t hi, int64_t depth)
{
    if (*len == *cap) {
        int64_t grown = *cap ? 2 * *cap : 64;
        group_t *more = PyMem_RawRealloc(*list, (size_t)grown * sizeof(group_t));
        if (more == NULL)
            return -1;
        *list = more;
        *cap = grown;
    }
    (*list)[(*len)++] = (group_t){lo, hi, depth};
    return 0;
}

/* Split a[0..m), ordered by chunk, into its runs of equal chunks (keys that agree before
 * `next`): in each run the keys that end by `next` come first, by length, and the rest is pushed
 * as a group `next` deep. lo is a's index in the whole. When starts is not NULL, starts[i] is set
 * to 1 where a run begins (a[i] differs from every key before it) and 0 elsewhere. 0 on success,
 * -1 when out of memory. */
static int
split_runs(const keys_t *k, item_t *a, item_t *t, int64_t m, int64_t lo, int64_t next,
           group_t **list, int64_t *len, int64_t *cap, unsigned char *starts)
{
    for (int64_t i = 0; i < m;) {
        int64_t j = i + 1;
        while (j < m && a[j].chunk == a[i].chunk)
            j++;
        if (starts != NULL) {
            starts[i] = 1;
            memset(starts + i + 1, 0, (size_t)(j - i - 1));
        }
        if (j - i > 1) {
            /* keys that end by `next` first (stable partition through t), by length */
            int64_t ended = 0, w = 0;
            for (int64_t x = i; x < j; x++) {
                int64_t kl = key_end(k, a[x].pos) - key_start(k, a[x].pos);
                if (kl <= next) {
                    a[x].chunk = (uint64_t)kl;
                    a[i + ended++] = a[x];
                } else {
                    t[w++] = a[x];
                }
            }
            memcpy(a + i + ended, t, (size_t)w * sizeof(item_t));
            if (ended > 1)
                radix_by_chunk(a + i, t, ended);
            if (w > 1 && push(list, len, cap, lo + i + ended, lo + j, next) < 0)
                return -1;
        }
        i = j;
    }
    return 0;
}

#define PROBE_WIDTH 64

/* The first level, in one pass over the keys in array order (their bytes are read in the order
 * they lie in memory, where the deeper levels read them scattered). Within the first W bytes,
 * W the shortest key's length (at most PROBE_WIDTH), every byte position where some key differs
 * from the first key is found; the first 8 such positions, read in order as one big-endian
 * number, order all keys (a position where all keys agree cannot decide between two of them,
 * and every key is long enough to have each position read). The keys whose numbers are equal
 * agree on every byte before `next`, the byte after the last position read (W when fewer than 8
 * positions differ), and are split as a deeper level is; n > 0. starts, when not NULL, marks
 * where the runs of equal numbers begin (split_runs): the deeper levels only reorder keys within
 * a run, so after the whole sort two neighbours in different runs are different keys.
 * On the engine's keys (UnsafeRow null bits and field offsets, the same in most keys) this
 * reads past the shared bytes at once. Measured on one 10M-key benchmark partition (229,151
 * records, 46 bytes per key on average), old and new alternating in one process, median of 7:
 * byte_order 45.2 -> 41.9 ms, last_of_each 63.1 -> 51.1 ms; the heap-map read in key order over
 * six partitions 0.99-1.16 -> 0.94-1.04 CPU us per row. There, the first 8 varying positions
 * already tell every distinct key apart; what is left is the radix passes and the byte-wise
 * comparisons of repeated keys, whose bytes lie in different files. */
static int
first_level(const keys_t *k, item_t *items, item_t *t, int64_t n, unsigned char *starts,
            group_t **list, int64_t *len, int64_t *cap)
{
    int64_t w = PROBE_WIDTH;
    for (int64_t i = 0; i < n; i++) {
        int64_t kl = key_end(k, i) - key_start(k, i);
        if (kl < w)
            w = kl;
    }
    const unsigned char *data = key_data(k), *first = data + key_start(k, 0);
    unsigned char varies[PROBE_WIDTH];
    memset(varies, 0, sizeof(varies));
    for (int64_t i = 1; i < n; i++) {
        const unsigned char *p = data + key_start(k, i);
        for (int64_t j = 0; j < w; j++)
            varies[j] |= (unsigned char)(p[j] ^ first[j]);
    }
    int64_t where[8], found = 0, next = w;
    for (int64_t j = 0; j < w && found < 8; j++)
        if (varies[j])
            where[found++] = j;
    if (found == 8)
        next = where[7] + 1;
    for (int64_t i = 0; i < n; i++) {
        const unsigned char *p = data + key_start(k, i);
        uint64_t c = 0;
        for (int64_t j = 0; j < found; j++)
            c = (c << 8) | p[where[j]];
        items[i].chunk = c;
    }
    radix_by_chunk(items, t, n);
    return split_runs(k, items, t, n, 0, next, list, len, cap, starts);
}

/* Sort items[0..n) (pos = 0..n-1 in order, chunk free) byte-wise; t is scratch room for n items;
 * starts as for first_level (left as it is for n <= SMALL_GROUP: no first level). 0 on success,
 * -1 when out of memory. Needs no GIL (PyMem_Raw allocator only). */
static int
sort_keys(const keys_t *k, item_t *items, item_t *t, int64_t n, unsigned char *starts)
{
    group_t *list = NULL;
    int64_t len = 0, cap = 0;
    int failed = 0;
    if (n > SMALL_GROUP)
        failed = first_level(k, items, t, n, starts, &list, &len, &cap);
    else
        failed = push(&list, &len, &cap, 0, n, 0);
    while (!failed && len > 0) {
        group_t g = list[--len];
        item_t *a = items + g.lo;
        int64_t m = g.hi - g.lo;
        if (m < 2)
            continue;
        if (m <= SMALL_GROUP) {
            insertion_sort(k, a, m, g.depth);
            continue;
        }
        for (int64_t i = 0; i < m; i++)
            a[i].chunk = chunk_at(k, a[i].pos, g.depth);
        radix_by_chunk(a, t, m);
        failed = split_runs(k, a, t, m, g.lo, g.depth + 8, &list, &len, &cap, NULL);
    }
    PyMem_RawFree(list);
    return failed ? -1 : 0;
}

/* Whether every key is byte-wise greater than the one before it (no key twice). Stops at the
 * first pair that is not, so keys in any other order cost a comparison or two. */
static int
strictly_increasing(const keys_t *k, int64_t n)
{
    for (int64_t i = 1; i < n; i++)
        if (compare_from(k, i - 1, i, 0) >= 0)
            return 0;
    return 1;
}

/* Parse (offsets, data, offset, count, large) with `format`, open and check the array
 * (open_binary) and sort its positions. On success returns the sorted items (k->... holds the
 * exported array, count in *n) for release_sorted; on failure returns NULL with an exception set
 * and nothing held. When starts is not NULL, *starts receives first_level's marks of where its
 * runs begin, by index in the sorted items (all zero, no marks, for arrays too small for a first
 * level), for the caller to PyMem_RawFree. *presorted is set when the keys already stood in
 * strictly increasing order (a heap-map file this tool wrote from rows in key order, read back):
 * the items are then 0..n-1 in order, unsorted, and no two keys are equal. */
static item_t *
sorted_items(PyObject *args, const char *format, keys_t *k, int64_t *n, unsigned char **starts, int *presorted)
{
    PyObject *offsets_obj, *data_obj;
    Py_ssize_t offset, count;
    int large;
    int64_t bytes;
    if (!PyArg_ParseTuple(args, format, &offsets_obj, &data_obj, &offset, &count, &large))
        return NULL;
    if (count < 0) {
        PyErr_SetString(PyExc_ValueError, "count must not be negative");
        return NULL;
    }
    if (open_binary(k, offsets_obj, data_obj, offset, large, (int64_t)count, &bytes, "key") < 0)
        return NULL;
    *n = (int64_t)count;
    item_t *items = PyMem_RawMalloc((size_t)(*n ? *n : 1) * sizeof(item_t));
    item_t *t = PyMem_RawMalloc((size_t)(*n ? *n : 1) * sizeof(item_t));
    unsigned char *marks = starts == NULL ? NULL : PyMem_RawCalloc((size_t)(*n ? *n : 1), 1);
    int failed = items == NULL || t == NULL || (starts != NULL && marks == NULL);
    if (!failed) {
        for (int64_t i = 0; i < *n; i++)
            items[i].pos = i;
        Py_BEGIN_ALLOW_THREADS
        *presorted = strictly_increasing(k, *n);
        if (!*presorted)
            failed = sort_keys(k, items, t, *n, marks);
        Py_END_ALLOW_THREADS
    }
    PyMem_RawFree(t);
    if (failed) {
        PyErr_NoMemory();
        PyMem_RawFree(marks);
        PyMem_RawFree(items);
        release_binary(k);
        return NULL;
    }
    if (starts != NULL)
        *starts = marks;
    return items;
}

/* The positions of items[0..n) as a bytes object of int64, and everything released. */
static PyObject *
positions(item_t *items, int64_t n, keys_t *k)
{
    PyObject *result = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)(n * 8));
    if (result != NULL) {
        int64_t *out = (int64_t *)PyBytes_AS_STRING(result);
        for (int64_t i = 0; i < n; i++)
            out[i] = items[i].pos;
    }
    PyMem_RawFree(items);
    release_binary(k);
    return result;
}

PyDoc_STRVAR(byte_order_doc,
"byte_order(offsets, data, offset, count, large) -> bytes\n\n"
"The int64 positions of a binary array's elements in byte-wise order (see the module source).");

static PyObject *
byte_order(PyObject *self, PyObject *args)
{
    (void)self;
    keys_t k;
    int64_t n;
    int presorted;
    item_t *items = sorted_items(args, "OOnnp:byte_order", &k, &n, NULL, &presorted);
    return items == NULL ? NULL : positions(items, n, &k);
}

PyDoc_STRVAR(last_of_each_doc,
"last_of_each(offsets, data, offset, count, large) -> bytes\n\n"
"The int64 position of the last occurrence of every distinct element of a binary array, in\n"
"byte-wise order of the elements (see the module source).");

static PyObject *
last_of_each(PyObject *self, PyObject *args)
{
    (void)self;
    keys_t k;
    int64_t n;
    unsigned char *starts = NULL;
    int presorted;
    item_t *items = sorted_items(args, "OOnnp:last_of_each", &k, &n, &starts, &presorted);
    if (items == NULL)
        return NULL;
    if (presorted) {  /* every key once, in order: each is its own last write */
        PyMem_RawFree(starts);
        return positions(items, n, &k);
    }
    int64_t distinct = 0;
    Py_BEGIN_ALLOW_THREADS
    /* equal keys are adjacent after the sort, in no particular order: keep each run's largest
     * position, compacted in place into items[0..distinct). A neighbour that begins a run of
     * the first level is a different key; only neighbours within a run are compared byte by
     * byte. */
    for (int64_t i = 0; i < n;) {
        int64_t last = items[i].pos, j = i + 1;
        while (j < n && !starts[j] && compare_from(&k, items[i].pos, items[j].pos, 0) == 0) {
            if (items[j].pos > last)
                last = items[j].pos;
            j++;
        }
        items[distinct++].pos = last;
        i = j;
    }
    Py_END_ALLOW_THREADS
    PyMem_RawFree(starts);
    return positions(items, distinct, &k);
}

/* ---------------------------------------------------------------- last writes in file order */

/* XXH3_64bits(input, length) of the system's libxxhash (xxhash.h, 0.8 and later), loaded by
 * soname at import like _lz4stream.c does; NULL when it is missing, and then the module has no
 * last_in_file_order (the caller sorts with last_of_each instead). */
typedef uint64_t (*xxh3_fn)(const void *, size_t);
static xxh3_fn xxh3 = NULL;

/* One slot of the open-addressing table: the top 32 bits of the key's hash and its position + 1
 * (0: empty). */
typedef struct {
    uint32_t tag, pos;
} slot_t;

#define PREFETCH_AHEAD 8

PyDoc_STRVAR(last_in_file_order_doc,
"last_in_file_order(offsets, data, offset, count, large) -> bytes\n\n"
"The int64 position of the last occurrence of every distinct element of a binary array, in\n"
"increasing order of position (see the module source).");

/* The records are read from the last to the first, each key looked up in a hash table (linear
 * probing, at most half full): the first time a key is met is its last write, and its position
 * is marked; an older record of it finds it there. The marks are then read in order, so the
 * positions come out increasing without a sort. The table's slot for a record is fetched
 * PREFETCH_AHEAD records before it is probed: the probes land anywhere in a table of 8 bytes per
 * slot, larger than the caches for a big partition. */
static PyObject *
last_in_file_order(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *offsets_obj, *data_obj;
    Py_ssize_t offset, count;
    int large;
    int64_t bytes;
    keys_t k;
    if (!PyArg_ParseTuple(args, "OOnnp:last_in_file_order", &offsets_obj, &data_obj, &offset, &count, &large))
        return NULL;
    if (count < 0 || (int64_t)count >= (int64_t)UINT32_MAX) {
        PyErr_SetString(PyExc_ValueError, "count must be from 0 to 2**32 - 2");
        return NULL;
    }
    if (open_binary(&k, offsets_obj, data_obj, offset, large, (int64_t)count, &bytes, "key") < 0)
        return NULL;
    int64_t n = (int64_t)count, cap = 16;
    while (cap < 2 * n)
        cap <<= 1;
    slot_t *table = PyMem_RawCalloc((size_t)cap, sizeof(slot_t));
    unsigned char *keep = PyMem_RawCalloc((size_t)(n ? n : 1), 1);
    if (table == NULL || keep == NULL) {
        PyMem_RawFree(table);
        PyMem_RawFree(keep);
        release_binary(&k);
        return PyErr_NoMemory();
    }
    int64_t kept = 0;
    int presorted;
    Py_BEGIN_ALLOW_THREADS
    presorted = strictly_increasing(&k, n);  /* as last_of_each: every key once, nothing to look up */
    if (presorted) {
        memset(keep, 1, (size_t)n);
        kept = n;
    }
    const unsigned char *data = key_data(&k);
    uint64_t mask = (uint64_t)cap - 1, ahead[PREFETCH_AHEAD];
    for (int64_t i = n - 1; !presorted && i >= 0 && i >= n - PREFETCH_AHEAD; i--) {
        int64_t s = key_start(&k, i);
        ahead[i % PREFETCH_AHEAD] = xxh3(data + s, (size_t)(key_end(&k, i) - s));
        __builtin_prefetch(&table[ahead[i % PREFETCH_AHEAD] & mask]);
    }
    for (int64_t i = presorted ? -1 : n - 1; i >= 0; i--) {
        uint64_t h = ahead[i % PREFETCH_AHEAD];
        if (i >= PREFETCH_AHEAD) {  /* the record PREFETCH_AHEAD before this one takes its ring slot */
            int64_t j = i - PREFETCH_AHEAD, js = key_start(&k, j);
            ahead[j % PREFETCH_AHEAD] = xxh3(data + js, (size_t)(key_end(&k, j) - js));
            __builtin_prefetch(&table[ahead[j % PREFETCH_AHEAD] & mask]);
        }
        int64_t s = key_start(&k, i), len = key_end(&k, i) - s;
        uint32_t tag = (uint32_t)(h >> 32);
        for (uint64_t at = h & mask;; at = (at + 1) & mask) {
            slot_t *slot = &table[at];
            if (slot->pos == 0) {
                slot->tag = tag;
                slot->pos = (uint32_t)(i + 1);
                keep[i] = 1;
                kept++;
                break;
            }
            if (slot->tag == tag) {
                int64_t other = (int64_t)slot->pos - 1, os = key_start(&k, other);
                if (key_end(&k, other) - os == len && memcmp(data + os, data + s, (size_t)len) == 0)
                    break;  /* a newer record of this key was met first */
            }
        }
    }
    Py_END_ALLOW_THREADS
    PyMem_RawFree(table);
    PyObject *result = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)(kept * 8));
    if (result != NULL) {
        int64_t *out = (int64_t *)PyBytes_AS_STRING(result), w = 0;
        for (int64_t i = 0; i < n; i++)
            if (keep[i])
                out[w++] = i;
    }
    PyMem_RawFree(keep);
    release_binary(&k);
    return result;
}

static PyMethodDef hashed_methods[] = {
    {"last_in_file_order", last_in_file_order, METH_VARARGS, last_in_file_order_doc},
    {NULL, NULL, 0, NULL},
};

static PyMethodDef keysort_methods[] = {
    {"byte_order", byte_order, METH_VARARGS, byte_order_doc},
    {"last_of_each", last_of_each, METH_VARARGS, last_of_each_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef keysort_module = {
    PyModuleDef_HEAD_INIT,
    "migrate.providers._keysort",
    "The byte-wise order of a binary array's keys and the last write of each, compiled (see migrate.providers.rocksdb_db, hdfs).",
    0,
    keysort_methods,
    NULL,
    NULL,
    NULL,
    NULL,
};

PyMODINIT_FUNC
PyInit__keysort(void)
{
    PyObject *module = PyModule_Create(&keysort_module);
    if (module == NULL)
        return NULL;
    void *lib = dlopen("libxxhash.so.0", RTLD_NOW | RTLD_LOCAL);
    xxh3 = lib ? (xxh3_fn)dlsym(lib, "XXH3_64bits") : NULL;
    /* checked before first use: XXH3_64bits of empty input (xxHash's sanity values, from memory;
     * the same as the reference xxhash package's xxh3_64_intdigest(b"") here) and of a
     * hand-picked input (that package's value) */
    if (xxh3 != NULL && (xxh3("", 0) != 0x2D06800538D394C2ULL || xxh3("stateshift", 10) != 0xE78B4E6CD57FC20BULL))
        xxh3 = NULL;
    if (xxh3 != NULL && PyModule_AddFunctions(module, hashed_methods) < 0) {
        Py_DECREF(module);
        return NULL;
    }
    return module;
}
