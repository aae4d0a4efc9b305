/* migrate.codecs._lz4stream: the engine's LZ4 block stream decoded in one compiled pass.
 *
 * decompress(data, seed, mask) -> bytearray | None
 *     The original bytes of a well-formed lz4-java block stream (the framing that
 *     migrate/codecs/lz4_stream.py describes: "LZ4Block" headers, an end mark, streams back to
 *     back), every block's checksum checked: XXH32(original, seed) & mask must equal the header's.
 *     None for anything else (a bad header, a truncated block, a block that does not decompress
 *     to its stated length, a checksum mismatch, no end mark, trailing bytes): the Python
 *     decoder, Lz4BlockStream._decompress_py, is the reference and names the problem. Raises
 *     RuntimeError when the libraries are not loaded (see available()).
 *
 * compress(prefix, data, block_size, level, seed, mask, final) -> (bytes, bytes)
 *     The blocks of the bytes prefix + data, cut every block_size bytes, as lz4-java writes them:
 *     each block's header ("LZ4Block", method | level, compressed length, original length,
 *     XXH32(original, seed) & mask) and payload, a block that does not shrink stored as it is
 *     (RAW). Returns the blocks written and the tail, the bytes after the last whole block (fewer
 *     than block_size), for the next call's prefix. With final, the tail becomes a last (short)
 *     block, the end mark follows and the tail returned is empty. So a stream is built part by
 *     part, and its input is never held joined: Lz4BlockStream.compress_parts. prefix must be
 *     shorter than block_size (ValueError otherwise); block_size in [64, 1 << 25], level in
 *     [0, 15]. Raises RuntimeError when the libraries are not loaded.
 *
 * available() -> bool
 *     Whether the system's liblz4 and libxxhash loaded and passed their checks at import.
 *
 * Why: the Python decoder costs a Python loop turn, a fresh 32 KiB bytes object, and a copy
 * into a growing bytearray (with its reallocations) per block. A native profile of the 10M-key
 * export put 3 % of all samples in that copy and its reallocations. Here the headers are walked
 * once to size the output, and every block decompresses straight into it, without the GIL.
 *
 * compress: the Python writer made a 32 KiB bytes object, a header and a list entry per block,
 * and was handed the whole file's records joined into one buffer first; a native profile of the
 * 10M-key convert RocksDB -> heap map put 4-5 % of its samples in those joins and per-block
 * steps. Here blocks are compressed straight into one output per part, without the GIL.
 *
 * The block compression and the checksum are libraries, not code of ours: LZ4_decompress_safe
 * and LZ4_compress_default from the system's liblz4 (Debian's liblz4-1; lz4.h documents it, quoted from memory:
 * "compressedSize is the exact complete size of the compressed block; dstCapacity is the size of
 * destination buffer; returns
 * the number of bytes decompressed into destination buffer, or a negative result if the source
 * stream is detected malformed") and XXH32 from the system's libxxhash (Debian's libxxhash0;
 * xxhash.h: XXH32(input, length, seed)). Both are loaded with dlopen by soname (their headers are
 * not needed to build), and used only after they pass checks at import: LZ4 must turn a block
 * written here by the LZ4 block format's rules (a literal run, a match that overlaps itself,
 * the final literals) into its bytes and refuse a truncated copy of it; XXH32 of empty input with
 * seed 0 must be 0x02CC5D05 (from memory; the test file holds both check values to the python lz4
 * and xxhash packages, and decodes streams whose checksums the xxhash package computed). Without them the Python decoder
 * does everything, with the same results.
 *
 * Bounds: every header is read within the buffer; lengths are checked as the Python decoder
 * checks them (non-negative, at most the block size the token names, RAW blocks stored whole,
 * the end mark with zero lengths and checksum, the payload within the buffer). The total output
 * is refused (None) when it exceeds 256 times the input plus 64 bytes: no LZ4 block expands
 * that much (the format's best ratio is about 255, a run of 0xFF length bytes), so a header
 * that claims more is malformed and the Python decoder says where.
 */

#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <dlfcn.h>
#include <stdint.h>
#include <string.h>

#define HEADER_LEN 21
#define METHOD_RAW 0x10
#define METHOD_LZ4 0x20
#define LEVEL_BASE 10

typedef int (*lz4_fn)(const char *src, char *dst, int compressed_size, int dst_capacity);
typedef int (*lz4_bound_fn)(int input_size);
typedef unsigned int (*xxh32_fn)(const void *input, size_t length, unsigned int seed);

/* LZ4_decompress_safe(src, dst, compressedSize, dstCapacity) and LZ4_compress_default(src, dst,
 * srcSize, dstCapacity) share a signature (lz4.h, quoted from memory: the latter "returns the
 * number of bytes written into buffer 'dst' (necessarily <= dstCapacity) or 0 if compression
 * fails"); LZ4_compressBound(inputSize) is the most a block of that size can take. */
static lz4_fn lz4_decompress_safe = NULL;
static lz4_fn lz4_compress_default = NULL;
static lz4_bound_fn lz4_compress_bound = NULL;
static xxh32_fn xxh32 = NULL;

static int32_t
le_int32(const unsigned char *p)
{
    uint32_t v = (uint32_t)p[0] | ((uint32_t)p[1] << 8) | ((uint32_t)p[2] << 16) | ((uint32_t)p[3] << 24);
    return (int32_t)v;
}

/* The fields after the magic of the block header at p (HEADER_LEN bytes, read by the caller's
 * bounds): token, compressed length, original length, checksum (lz4_stream.HEADER). */
typedef struct {
    int token;
    int64_t comp, orig;
    uint32_t check;
} header_t;

static header_t
header_at(const unsigned char *p)
{
    header_t h = {p[8], le_int32(p + 9), le_int32(p + 13), (uint32_t)le_int32(p + 17)};
    return h;
}

/* Load both libraries and check them; leaves both pointers NULL unless both pass. */
static void
load_libraries(void)
{
    void *lz4 = dlopen("liblz4.so.1", RTLD_NOW | RTLD_LOCAL);
    void *xxh = dlopen("libxxhash.so.0", RTLD_NOW | RTLD_LOCAL);
    lz4_fn d = lz4 ? (lz4_fn)dlsym(lz4, "LZ4_decompress_safe") : NULL;
    lz4_fn c = lz4 ? (lz4_fn)dlsym(lz4, "LZ4_compress_default") : NULL;
    lz4_bound_fn b = lz4 ? (lz4_bound_fn)dlsym(lz4, "LZ4_compressBound") : NULL;
    xxh32_fn h = xxh ? (xxh32_fn)dlsym(xxh, "XXH32") : NULL;
    int ok = d != NULL && c != NULL && b != NULL && h != NULL;
    if (ok) {
        /* An LZ4 block by the block format's rules: token 0x34 (3 literals, match length 4 + 4),
         * "abc", offset 3 (little-endian), so the match copies "abcabcab" over itself; then the
         * last sequence, token 0x50 (5 literals), "tail!". The last 5 bytes must be literals. */
        static const unsigned char block[] = {0x34, 'a', 'b', 'c', 0x03, 0x00, 0x50, 't', 'a', 'i', 'l', '!'};
        static const char expect[] = "abcabcabcabtail!";
        char out[32];
        int n = d((const char *)block, out, (int)sizeof(block), (int)sizeof(out));
        ok = n == 16 && memcmp(out, expect, 16) == 0;
        /* the same block cut short must be refused, not read past */
        ok = ok && d((const char *)block, out, 8, (int)sizeof(out)) < 0;
        ok = ok && h("", 0, 0) == 0x02CC5D05u;
        /* compression must give a block that decompresses to its input, within the bound */
        static const char text[] = "state store state store state store: snapshot, delta, snapshot, delta";
        int n_text = (int)sizeof(text) - 1;
        char packed[160], back[sizeof(text)];
        int bound = ok ? b(n_text) : 0;
        ok = ok && bound >= n_text && bound <= (int)sizeof(packed);
        int n_packed = ok ? c(text, packed, n_text, bound) : 0;
        ok = ok && n_packed > 0 && n_packed < n_text && d(packed, back, n_packed, n_text) == n_text
             && memcmp(back, text, (size_t)n_text) == 0;
    }
    if (!ok) {
        if (lz4)
            dlclose(lz4);
        if (xxh)
            dlclose(xxh);
        return;
    }
    lz4_decompress_safe = d;
    lz4_compress_default = c;
    lz4_compress_bound = b;
    xxh32 = h;
}

/* Walk the headers of data[0..len) as Lz4BlockStream._decompress_py does; the total original
 * length, or -1 for anything it would refuse. */
static int64_t
walk(const unsigned char *data, int64_t len)
{
    static const unsigned char magic[8] = {'L', 'Z', '4', 'B', 'l', 'o', 'c', 'k'};
    int64_t pos = 0, total = 0;
    int ended = 0;
    while (pos < len) {
        if (len - pos < HEADER_LEN || memcmp(data + pos, magic, 8) != 0)
            return -1;
        header_t h = header_at(data + pos);
        int64_t comp = h.comp, orig = h.orig;
        int method = h.token & 0xF0;
        int64_t max_len = (int64_t)1 << (LEVEL_BASE + (h.token & 0x0F));
        if ((method != METHOD_RAW && method != METHOD_LZ4) || comp < 0 || orig < 0 || orig > max_len
            || (orig == 0) != (comp == 0) || (method == METHOD_RAW && orig != comp))
            return -1;
        int64_t body = pos + HEADER_LEN;
        if (orig == 0) {
            if (h.check != 0)
                return -1;
            ended = 1;
            pos = body;
            continue;
        }
        ended = 0;
        if (len - body < comp)
            return -1;
        total += orig;
        if (total > 256 * len + 64)
            return -1;
        pos = body + comp;
    }
    return ended ? total : -1;
}

/* Decompress and check every block into out (total bytes, from walk); 0 when all is well. */
static int
fill(const unsigned char *data, int64_t len, char *out, uint32_t seed, uint32_t mask)
{
    int64_t pos = 0, at = 0;
    while (pos < len) {
        header_t h = header_at(data + pos);
        const unsigned char *body = data + pos + HEADER_LEN;
        pos += HEADER_LEN + h.comp;
        if (h.orig == 0)
            continue;
        if ((h.token & 0xF0) == METHOD_RAW) {
            memcpy(out + at, body, (size_t)h.orig);
        } else if (lz4_decompress_safe((const char *)body, out + at, (int)h.comp, (int)h.orig) != h.orig) {
            return -1;
        }
        if ((xxh32(out + at, (size_t)h.orig, seed) & mask) != h.check)
            return -1;
        at += h.orig;
    }
    return 0;
}

static PyObject *
decompress(PyObject *self, PyObject *args)
{
    Py_buffer data;
    unsigned long seed, mask;
    if (!PyArg_ParseTuple(args, "y*kk:decompress", &data, &seed, &mask))
        return NULL;
    if (lz4_decompress_safe == NULL) {
        PyBuffer_Release(&data);
        PyErr_SetString(PyExc_RuntimeError, "liblz4 and libxxhash are not loaded (see available())");
        return NULL;
    }
    const unsigned char *src = (const unsigned char *)data.buf;
    int64_t len = (int64_t)data.len;
    int64_t total = walk(src, len);
    if (total < 0) {
        PyBuffer_Release(&data);
        Py_RETURN_NONE;
    }
    PyObject *out = PyByteArray_FromStringAndSize(NULL, (Py_ssize_t)total);
    if (out == NULL) {
        PyBuffer_Release(&data);
        return NULL;
    }
    char *dst = PyByteArray_AS_STRING(out);
    int failed;
    Py_BEGIN_ALLOW_THREADS
    failed = fill(src, len, dst, (uint32_t)seed, (uint32_t)mask);
    Py_END_ALLOW_THREADS
    PyBuffer_Release(&data);
    if (failed) {
        Py_DECREF(out);
        Py_RETURN_NONE;
    }
    return out;
}

static void
put_le_int32(unsigned char *p, uint32_t v)
{
    p[0] = (unsigned char)v;
    p[1] = (unsigned char)(v >> 8);
    p[2] = (unsigned char)(v >> 16);
    p[3] = (unsigned char)(v >> 24);
}

/* One block header at p: magic, token, compressed length, original length, checksum. */
static void
put_header(unsigned char *p, int token, int64_t comp, int64_t orig, uint32_t check)
{
    memcpy(p, "LZ4Block", 8);
    p[8] = (unsigned char)token;
    put_le_int32(p + 9, (uint32_t)comp);
    put_le_int32(p + 13, (uint32_t)orig);
    put_le_int32(p + 17, check);
}

/* Write one block of src[0..n) at out (room for HEADER_LEN + bound); returns the bytes written. */
static int64_t
put_block(unsigned char *out, const char *src, int n, int bound, int level, uint32_t seed, uint32_t mask)
{
    int packed = lz4_compress_default(src, (char *)out + HEADER_LEN, n, bound);
    int method = METHOD_LZ4;
    if (packed <= 0 || packed >= n) { /* like lz4-java: a block that does not shrink is stored */
        memcpy(out + HEADER_LEN, src, (size_t)n);
        packed = n;
        method = METHOD_RAW;
    }
    put_header(out, method | level, packed, n, xxh32(src, (size_t)n, seed) & mask);
    return HEADER_LEN + packed;
}

static PyObject *
compress(PyObject *self, PyObject *args)
{
    Py_buffer prefix, data;
    Py_ssize_t block_size;
    int level, final;
    unsigned long seed, mask;
    if (!PyArg_ParseTuple(args, "y*y*nikkp:compress", &prefix, &data, &block_size, &level, &seed, &mask, &final))
        return NULL;
    PyObject *result = NULL, *out = NULL, *tail = NULL;
    char *scratch = NULL;
    if (lz4_compress_default == NULL) {
        PyErr_SetString(PyExc_RuntimeError, "liblz4 and libxxhash are not loaded (see available())");
        goto done;
    }
    if (block_size < 64 || block_size > (1 << 25) || level < 0 || level > 15) {
        PyErr_SetString(PyExc_ValueError, "block_size must be in [64, 1 << 25] and level in [0, 15]");
        goto done;
    }
    if (prefix.len >= block_size) {
        PyErr_SetString(PyExc_ValueError, "prefix must be shorter than block_size");
        goto done;
    }
    const char *pre = (const char *)prefix.buf, *src = (const char *)data.buf;
    int64_t plen = (int64_t)prefix.len, dlen = (int64_t)data.len, bs = (int64_t)block_size;
    int64_t total = plen + dlen;
    int64_t blocks = total / bs, rest = total - blocks * bs;
    int64_t last = final && rest > 0; /* the short last block */
    int bound = lz4_compress_bound((int)bs);
    if (bound <= 0) {
        PyErr_SetString(PyExc_ValueError, "LZ4_compressBound refuses this block size");
        goto done;
    }
    int64_t room = (blocks + last) * (HEADER_LEN + (int64_t)bound) + (final ? HEADER_LEN : 0);
    out = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)room);
    if (out == NULL)
        goto done;
    if (plen > 0 && (blocks > 0 || last)) {
        scratch = PyMem_RawMalloc((size_t)bs);
        if (scratch == NULL) {
            PyErr_NoMemory();
            goto done;
        }
    }
    unsigned char *w = (unsigned char *)PyBytes_AS_STRING(out);
    int64_t at = 0;                           /* bytes of prefix + data taken */
    Py_BEGIN_ALLOW_THREADS
    for (int64_t i = 0; i < blocks + last; i++) {
        int64_t n = i < blocks ? bs : rest;
        const char *block;
        if (at < plen) { /* only the first block can start in the prefix: prefix < block size */
            memcpy(scratch, pre + at, (size_t)(plen - at));
            memcpy(scratch + (plen - at), src, (size_t)(n - (plen - at)));
            block = scratch;
        } else {
            block = src + (at - plen);
        }
        w += put_block(w, block, (int)n, bound, level, (uint32_t)seed, (uint32_t)mask);
        at += n;
    }
    if (final) {
        put_header(w, METHOD_RAW | level, 0, 0, 0);
        w += HEADER_LEN;
    }
    Py_END_ALLOW_THREADS
    /* the tail: prefix + data from at on (empty after final) */
    tail = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)(total - at));
    if (tail == NULL)
        goto done;
    {
        char *t = PyBytes_AS_STRING(tail);
        if (at < plen) { /* no block was taken: all of prefix and data */
            memcpy(t, pre + at, (size_t)(plen - at));
            memcpy(t + (plen - at), src, (size_t)dlen);
        } else {
            memcpy(t, src + (at - plen), (size_t)(total - at));
        }
    }
    if (_PyBytes_Resize(&out, (Py_ssize_t)(w - (unsigned char *)PyBytes_AS_STRING(out))) < 0)
        goto done;
    result = PyTuple_Pack(2, out, tail);
done:
    PyMem_RawFree(scratch);
    Py_XDECREF(out);
    Py_XDECREF(tail);
    PyBuffer_Release(&data);
    PyBuffer_Release(&prefix);
    return result;
}

static PyObject *
available(PyObject *self, PyObject *unused)
{
    return PyBool_FromLong(lz4_decompress_safe != NULL);
}

static PyMethodDef methods[] = {
    {"decompress", decompress, METH_VARARGS,
     "decompress(data, seed, mask) -> the stream's bytes (bytearray), or None when it is not well formed"},
    {"compress", compress, METH_VARARGS,
     "compress(prefix, data, block_size, level, seed, mask, final) -> (the blocks of prefix + data, the tail after them)"},
    {"available", available, METH_NOARGS, "available() -> whether liblz4 and libxxhash loaded and passed their checks"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_lz4stream", NULL, -1, methods};

PyMODINIT_FUNC
PyInit__lz4stream(void)
{
    load_libraries();
    return PyModule_Create(&module);
}
