/* migrate.providers._framing: the record walk of heap-map state files, compiled.
 *
 * A decompressed heap-map file is a run of records
 *
 *     int32 BE key length, key bytes, int32 BE value length, value bytes
 *
 * where a value length of -1 marks a removal (allowed in deltas only), closed by an int32 -1 with
 * nothing after it. Finding where each record starts is sequential (every offset depends on the
 * lengths before it), so it cannot be vectorised; this module does exactly the walk of
 * migrate/providers/hdfs.py:_record_starts_py, which stays the reference and the fallback when this
 * extension is not built (it is optional, see setup.py).
 *
 * record_starts(data, allow_removals) -> bytes | None
 *     data: any object exporting a contiguous buffer (bytes, bytearray, memoryview).
 *     Returns the int64 start offset of every record in native byte order (Python reads it with
 *     numpy.frombuffer(..., dtype=numpy.int64)), or None when the records are irregular in any
 *     way; the caller then runs the reference parser, which raises the exact error. This module
 *     never describes what is wrong.
 *
 * Bounds: every length is checked against the bytes that remain before it is used, in 64-bit
 * arithmetic (int64_t), so neither a huge length nor a buffer of 2 GiB or more can overflow or make
 * a read past the end. The walk runs without the GIL: it touches only the exported buffer and
 * memory of its own. The buffer's memory stays valid until PyBuffer_Release (the buffer protocol's
 * contract, CPython docs "Buffer Protocol"; bytearray refuses to resize while exported). Another
 * thread may still change the bytes of a mutable buffer meanwhile; every length is read once into
 * a local and checked before use, so that can only change the result, never the bounds.
 */

#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <stdint.h>
#include <string.h>

/* Outcome of a walk. */
enum { WALK_OK = 0, WALK_IRREGULAR = 1, WALK_NO_MEMORY = 2 };

/* The big-endian int32 at p, sign-extended; done on unsigned values so no conversion depends on
 * the compiler (converting an out-of-range value to a signed type is implementation-defined:
 * C11 6.3.1.3p3). */
static inline int64_t
be_int32(const unsigned char *p)
{
    uint32_t u = ((uint32_t)p[0] << 24) | ((uint32_t)p[1] << 16) | ((uint32_t)p[2] << 8) | (uint32_t)p[3];
    return u < 0x80000000u ? (int64_t)u : (int64_t)u - (int64_t)0x100000000;
}

/* Walk n bytes at buf. On WALK_OK *out holds *count starts (NULL when there are none) and the
 * caller frees it with PyMem_RawFree; on any other outcome nothing is left allocated.
 * Needs no GIL: it uses only the PyMem_Raw allocator, which the CPython docs ("Raw Memory
 * Interface") say is thread-safe, needs no GIL, and wraps the system malloc. */
static int
walk(const unsigned char *buf, int64_t n, int allow_removals, int64_t **out, int64_t *count)
{
    int64_t *starts = NULL;
    int64_t cap = 0, len = 0, pos = 0;

    *out = NULL;
    *count = 0;
    for (;;) {
        /* invariant: 0 <= pos <= n */
        if (n - pos < 4)
            goto irregular;                       /* no room for the end marker */
        int64_t klen = be_int32(buf + pos);
        if (klen == -1) {
            if (n - pos != 4)
                goto irregular;                   /* bytes after the end marker */
            break;
        }
        if (klen < 0)
            goto irregular;
        if (n - pos - 4 < klen + 4)
            goto irregular;                       /* key or value length past the end */
        int64_t vpos = pos + 4 + klen;            /* vpos + 4 <= n */
        int64_t vlen = be_int32(buf + vpos);
        int64_t next;
        if (vlen < 0) {
            if (vlen != -1 || !allow_removals)
                goto irregular;
            next = vpos + 4;
        }
        else {
            if (n - vpos - 4 < vlen)
                goto irregular;                   /* value past the end */
            next = vpos + 4 + vlen;
        }
        if (len == cap) {
            /* a record takes at least 8 bytes, so len < n / 8 + 1 and the sizes below cannot
             * overflow; the check keeps that true even on a 32-bit size_t */
            int64_t grown = cap ? cap * 2 : 1024;
            if ((uint64_t)grown > (uint64_t)PY_SSIZE_T_MAX / sizeof(int64_t))
                goto no_memory;
            int64_t *bigger = PyMem_RawRealloc(starts, (size_t)grown * sizeof(int64_t));
            if (bigger == NULL)
                goto no_memory;
            starts = bigger;
            cap = grown;
        }
        starts[len++] = pos;
        pos = next;
    }
    *out = starts;
    *count = len;
    return WALK_OK;

irregular:
    PyMem_RawFree(starts);
    return WALK_IRREGULAR;
no_memory:
    PyMem_RawFree(starts);
    return WALK_NO_MEMORY;
}

PyDoc_STRVAR(record_starts_doc,
"record_starts(data, allow_removals, /) -> bytes | None\n"
"\n"
"The int64 start offset (native byte order) of every record of one decompressed heap-map file,\n"
"or None when the records are irregular in any way (the caller explains the error).");

static PyObject *
record_starts(PyObject *module, PyObject *args)
{
    PyObject *data;
    int allow_removals;
    Py_buffer view;
    int64_t *starts = NULL;
    int64_t count = 0;
    int outcome;

    (void)module;
    if (!PyArg_ParseTuple(args, "Op:record_starts", &data, &allow_removals))
        return NULL;
    if (PyObject_GetBuffer(data, &view, PyBUF_SIMPLE) < 0)
        return NULL;
    Py_BEGIN_ALLOW_THREADS
    outcome = walk((const unsigned char *)view.buf, (int64_t)view.len, allow_removals, &starts, &count);
    Py_END_ALLOW_THREADS
    PyBuffer_Release(&view);

    if (outcome == WALK_IRREGULAR)
        Py_RETURN_NONE;
    if (outcome == WALK_NO_MEMORY)
        return PyErr_NoMemory();
    /* count * 8 <= view.len, so the size fits in Py_ssize_t */
    PyObject *result = PyBytes_FromStringAndSize((const char *)starts, (Py_ssize_t)(count * (int64_t)sizeof(int64_t)));
    PyMem_RawFree(starts);
    return result;
}

static PyMethodDef framing_methods[] = {
    {"record_starts", record_starts, METH_VARARGS, record_starts_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef framing_module = {
    PyModuleDef_HEAD_INIT,
    "migrate.providers._framing",
    "The record walk of heap-map state files, compiled (see migrate.providers.hdfs).",
    0,
    framing_methods,
    NULL,
    NULL,
    NULL,
    NULL,
};

PyMODINIT_FUNC
PyInit__framing(void)
{
    return PyModule_Create(&framing_module);
}
