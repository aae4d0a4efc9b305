/* migrate.rows._flatrows: the columns of flat UnsafeRows, compiled.
 *
 * decode(offsets, data, offset, large, count, kinds) -> list | None
 *     offsets, data, offset, large, count: one Arrow binary array of rows (int32 offsets, int64
 *     when `large`), its slice [offset, offset + count); checked by open_binary (_binary.h) first
 *     (ValueError). The rows must have no nulls (the caller checks). kinds: one byte per field of
 *     the rows' schema, which must hold only these:
 *         'z' boolean: the slot's first byte, non-zero is true, bit-packed as Arrow packs them;
 *         '1', '2', '4', '8': the slot's first 1, 2, 4 or 8 bytes, copied as they are (byte,
 *             short, int, date, float, long, timestamp, double, intervals: little-endian, as
 *             Arrow holds them);
 *         'v': a string or binary: the slot is offset << 32 | size, the bytes at the row's start
 *             plus offset.
 *     Returns one tuple per field: (null count, validity bitmap, values) for a fixed field and
 *     (null count, validity bitmap, int32 offsets, data) for 'v', every buffer a bytes object
 *     Arrow takes as it is (a null field reads as zero, or as an empty value). Returns None,
 *     decoding nothing, when a row is shorter than its null bits and slots, a value points past
 *     the end of its row, or a field's values reach 2**31 bytes: the caller then decodes with
 *     migrate/rows/unsafe_row.py, the reference, which names the row and what is wrong. Strings
 *     are not checked for UTF-8 here (the caller has Arrow validate them).
 *
 * The layout (migrate/rows/layout.py): null bits in 64-bit little-endian words, one per field
 * (set: null), then one 8-byte slot per field. Every read stays within its row, checked before
 * the row is read. This module serves the flat schemas most state stores have (the archive's
 * typed columns of an aggregation's key and value); anything nested goes the numpy way. Runs
 * without the GIL: it touches only the exported buffers and memory of its own.
 */

#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <stdint.h>
#include <string.h>

#include "../providers/_binary.h"

typedef struct {
    char kind;
    int64_t total;       /* 'v': bytes of all values */
    int64_t nulls;
    unsigned char *validity, *values, *data;
    PyObject *validity_obj, *values_obj, *data_obj;
} field_t;

static inline uint64_t
load64(const unsigned char *p)
{
    uint64_t v;
    memcpy(&v, p, 8);
    return v;
}

static int
kind_width(char k)
{
    switch (k) {
    case 'z': case '1': return 1;
    case '2': return 2;
    case '4': return 4;
    case '8': return 8;
    case 'v': return 0;
    default: return -1;
    }
}

static void
free_fields(field_t *f, Py_ssize_t n)
{
    for (Py_ssize_t j = 0; j < n; j++) {
        Py_XDECREF(f[j].validity_obj);
        Py_XDECREF(f[j].values_obj);
        Py_XDECREF(f[j].data_obj);
    }
    PyMem_Free(f);
}

/* Pass 1 over the rows: every row long enough, every value within its row; the bytes of each
 * 'v' field and the null count of each field. 0, or -1 when a row is malformed. */
static int
measure(const binary_t *rows, const unsigned char *base, int64_t count, field_t *f, Py_ssize_t nf, int64_t fixed,
        int64_t null_bytes)
{
    for (int64_t i = 0; i < count; i++) {
        int64_t s = offset_at(rows, i), e = offset_at(rows, i + 1);
        if (e - s < fixed)
            return -1;
        const unsigned char *row = base + s;
        for (Py_ssize_t j = 0; j < nf; j++) {
            uint64_t word = load64(row + 8 * (j >> 6));
            if ((word >> (j & 63)) & 1) {
                f[j].nulls++;
                continue;
            }
            if (f[j].kind != 'v')
                continue;
            uint64_t slot = load64(row + null_bytes + 8 * j);
            int64_t size = (int64_t)(slot & 0xFFFFFFFFu), at = (int64_t)(slot >> 32);
            if (at + size > e - s)  /* at, size < 2**32: no overflow */
                return -1;
            f[j].total += size;
            if (f[j].total > INT32_MAX)
                return -1;
        }
    }
    return 0;
}

static void
fill(const binary_t *rows, const unsigned char *base, int64_t count, field_t *f, Py_ssize_t nf, int64_t null_bytes)
{
    for (int64_t i = 0; i < count; i++) {  /* the buffers start zeroed: offsets[0] = 0, no bit set */
        const unsigned char *row = base + offset_at(rows, i);
        for (Py_ssize_t j = 0; j < nf; j++) {
            field_t *g = &f[j];
            uint64_t word = load64(row + 8 * (j >> 6));
            int null = (int)((word >> (j & 63)) & 1);
            if (!null)
                g->validity[i >> 3] |= (unsigned char)(1u << (i & 7));
            const unsigned char *slot = row + null_bytes + 8 * j;
            switch (g->kind) {
            case 'z':
                if (!null && slot[0])
                    g->values[i >> 3] |= (unsigned char)(1u << (i & 7));
                break;
            case '1': g->values[i] = null ? 0 : slot[0]; break;
            case '2': if (null) memset(g->values + 2 * i, 0, 2); else memcpy(g->values + 2 * i, slot, 2); break;
            case '4': if (null) memset(g->values + 4 * i, 0, 4); else memcpy(g->values + 4 * i, slot, 4); break;
            case '8': if (null) memset(g->values + 8 * i, 0, 8); else memcpy(g->values + 8 * i, slot, 8); break;
            case 'v': {
                int32_t *offs = (int32_t *)g->values;
                int32_t at = offs[i];
                if (!null) {
                    uint64_t s = load64(slot);
                    uint32_t size = (uint32_t)(s & 0xFFFFFFFFu);
                    memcpy(g->data + at, row + (s >> 32), size);
                    at += (int32_t)size;  /* the total was checked below 2**31 */
                }
                offs[i + 1] = at;
                break;
            }
            }
        }
    }
}

static PyObject *
new_zeroed(Py_ssize_t n, unsigned char **out)
{
    PyObject *b = PyBytes_FromStringAndSize(NULL, n);
    if (b != NULL) {
        *out = (unsigned char *)PyBytes_AS_STRING(b);
        memset(*out, 0, (size_t)n);
    }
    return b;
}

static PyObject *
decode(PyObject *module, PyObject *args)
{
    (void)module;
    PyObject *offsets, *data, *kinds_obj;
    Py_ssize_t offset, count;
    int large;
    if (!PyArg_ParseTuple(args, "OOnpnO!:decode", &offsets, &data, &offset, &large, &count, &PyBytes_Type, &kinds_obj))
        return NULL;
    if (count < 0) {
        PyErr_SetString(PyExc_ValueError, "count must not be negative");
        return NULL;
    }
    const char *kinds = PyBytes_AS_STRING(kinds_obj);
    Py_ssize_t nf = PyBytes_GET_SIZE(kinds_obj);
    if (nf == 0) {
        PyErr_SetString(PyExc_ValueError, "no fields");
        return NULL;
    }
    for (Py_ssize_t j = 0; j < nf; j++)
        if (kind_width(kinds[j]) < 0) {
            PyErr_Format(PyExc_ValueError, "unknown field kind %c", kinds[j]);
            return NULL;
        }
    binary_t rows;
    int64_t bytes = 0;
    if (open_binary(&rows, offsets, data, offset, large, count, &bytes, "row") < 0)
        return NULL;
    field_t *f = PyMem_Calloc((size_t)nf, sizeof(field_t));
    if (f == NULL) {
        release_binary(&rows);
        return PyErr_NoMemory();
    }
    for (Py_ssize_t j = 0; j < nf; j++)
        f[j].kind = kinds[j];
    int64_t null_bytes = ((nf + 63) / 64) * 8, fixed = null_bytes + 8 * (int64_t)nf;
    const unsigned char *base = (const unsigned char *)rows.dv.buf;
    int ok;
    Py_BEGIN_ALLOW_THREADS
    ok = measure(&rows, base, count, f, nf, fixed, null_bytes) == 0;
    Py_END_ALLOW_THREADS
    if (!ok) {
        free_fields(f, nf);
        release_binary(&rows);
        Py_RETURN_NONE;
    }
    Py_ssize_t bitmap = (count + 7) / 8;
    for (Py_ssize_t j = 0; j < nf; j++) {
        int w = kind_width(f[j].kind);
        Py_ssize_t values = f[j].kind == 'z' ? bitmap : f[j].kind == 'v' ? 4 * (count + 1) : w * count;
        f[j].validity_obj = new_zeroed(bitmap, &f[j].validity);
        f[j].values_obj = f[j].validity_obj ? new_zeroed(values, &f[j].values) : NULL;
        if (f[j].values_obj && f[j].kind == 'v')
            f[j].data_obj = new_zeroed((Py_ssize_t)f[j].total, &f[j].data);
        if (f[j].values_obj == NULL || (f[j].kind == 'v' && f[j].data_obj == NULL)) {
            free_fields(f, nf);
            release_binary(&rows);
            return NULL;
        }
    }
    Py_BEGIN_ALLOW_THREADS
    fill(&rows, base, count, f, nf, null_bytes);
    Py_END_ALLOW_THREADS
    release_binary(&rows);
    PyObject *out = PyList_New(nf);
    for (Py_ssize_t j = 0; out != NULL && j < nf; j++) {
        PyObject *t = f[j].kind == 'v'
            ? Py_BuildValue("(LOOO)", (long long)f[j].nulls, f[j].validity_obj, f[j].values_obj, f[j].data_obj)
            : Py_BuildValue("(LOO)", (long long)f[j].nulls, f[j].validity_obj, f[j].values_obj);
        if (t == NULL) {
            Py_CLEAR(out);
            break;
        }
        PyList_SET_ITEM(out, j, t);
    }
    free_fields(f, nf);
    return out;
}

static PyMethodDef methods[] = {
    {"decode", decode, METH_VARARGS,
     "decode(offsets, data, offset, large, count, kinds) -> per field (nulls, validity, values[, data]), or None"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "migrate.rows._flatrows",
    "The columns of flat UnsafeRows, compiled (see migrate.rows.unsafe_row).", -1, methods, NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC
PyInit__flatrows(void)
{
    const uint16_t probe = 1;
    if (*(const unsigned char *)&probe != 1) {  /* the slots are little-endian, copied as they are */
        PyErr_SetString(PyExc_ImportError, "migrate.rows._flatrows needs a little-endian machine");
        return NULL;
    }
    return PyModule_Create(&module);
}
