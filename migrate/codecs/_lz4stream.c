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
 * available() -> bool
 *     Whether the system's liblz4 and libxxhash loaded and passed their checks at import.
 *
 * Why: the Python decoder costs a Python loop turn, a fresh 32 KiB bytes object, and a copy
 * into a growing bytearray (with its reallocations) per block. A native profile of the 10M-key
 * export put 3 % of all samples in that copy and its reallocations. Here the headers are walked
 * once to size the output, and every block decompresses straight into it, without the GIL.
 *
 * The block compression and the checksum are libraries, not code of ours: LZ4_decompress_safe
 * from the system's liblz4 (Debian's liblz4-1; lz4.h documents it, quoted from memory:
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
typedef unsigned int (*xxh32_fn)(const void *input, size_t length, unsigned int seed);

static lz4_fn lz4_decompress_safe = NULL;
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
    xxh32_fn h = xxh ? (xxh32_fn)dlsym(xxh, "XXH32") : NULL;
    int ok = d != NULL && h != NULL;
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
    }
    if (!ok) {
        if (lz4)
            dlclose(lz4);
        if (xxh)
            dlclose(xxh);
        return;
    }
    lz4_decompress_safe = d;
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

static PyObject *
available(PyObject *self, PyObject *unused)
{
    return PyBool_FromLong(lz4_decompress_safe != NULL);
}

static PyMethodDef methods[] = {
    {"decompress", decompress, METH_VARARGS,
     "decompress(data, seed, mask) -> the stream's bytes (bytearray), or None when it is not well formed"},
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
