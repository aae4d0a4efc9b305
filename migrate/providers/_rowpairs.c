/* migrate.providers._rowpairs: rows between Arrow buffers and the RocksDB binding, compiled.
 *
 * rocksdict (the binding) gives and takes one Python bytes object per key and per value. Without
 * this module the tool appends each batch of a scan to Python lists and converts them with
 * pa.array, and writes a batch by prefixing its keys and values with Arrow, converting them with
 * to_pylist and looping over them in Python: migrate/providers/rocksdb_db.py:_collect_py and
 * _put_py, which stay the references and the fallbacks when this extension is not built (it is
 * optional, see setup.py).
 *
 * collect(rows, limit, max_bytes, key_prefix=b"", value_prefix=b"")
 *         -> (count, key_offsets, keys, value_offsets, values, stray)
 *     rows: an iterator of (key, value) 2-tuples of bytes (rocksdict's items() view).
 *     Takes up to `limit` rows, and stops early once the keys or the values of the rows taken
 *     reach `max_bytes` bytes, so a batch of large rows stays bounded. Returns the keys and the
 *     values, each as the int32 offsets (native byte order) and the data of an Arrow binary array,
 *     each key without key_prefix and each value without value_prefix (the encoding-version byte
 *     the engine puts in front; stripping it here spares a sliced copy of every batch). A row whose
 *     key or value does not start with its prefix ends the batch without being taken and is
 *     returned as `stray` (None otherwise): the caller reports it. A count below `limit` with no
 *     stray does not mean the iterator is exhausted; a count of 0 does (with limit > 0 and no
 *     stray). An exception raised by the iterator propagates unchanged (rows it gave before are
 *     lost: the caller fails the read). Raises TypeError for an item that is not a 2-tuple of
 *     bytes, and OverflowError when a batch's keys or values would reach 2**31 bytes (the batch
 *     stops at max_bytes first, so only a row of 2**31 - max_bytes bytes or more gets there).
 *     The four buffers are bytes objects grown in place and handed over without a copy; the data
 *     buffers are sized from the batch's first row (reserve_like), so even rows need no regrowth.
 *
 * put(target, key_prefix, value_prefix, key_offsets, keys, key_offset, keys_large, value_offsets,
 *     values, value_offset, values_large, count)
 *     Does `target[key_prefix + key] = value_prefix + value` for each of `count` rows of an Arrow
 *     binary key array and value array (their buffers and slice offsets, int32 or int64 offsets),
 *     in order, each key and value a new bytes object: rocksdict's SstFileWriter.__setitem__ is
 *     its put, and the prefixes are the encoding-version byte of the rows the engine writes. Both
 *     arrays are checked first (_binary.h: ValueError before any row is put); an exception raised
 *     by the target stops the loop and propagates unchanged.
 *
 * Bounds: lengths and running totals are int64_t and checked against INT32_MAX before they become
 * offsets (collect); every element of an array put is shorter than 2**31 bytes (open_binary), so a
 * prefixed one fits a Py_ssize_t. The loops call into Python (the iterator, the target), so they
 * hold the GIL throughout.
 */

#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "_binary.h"

/* A growing byte buffer: a bytes object of its own (refcount 1), resized in place, so the
 * finished buffer is handed over without a copy. */
typedef struct {
    PyObject *bytes;
    int64_t len, cap;
} grow_t;

static int
grow_reserve(grow_t *g, int64_t more)
{
    if (g->len + more <= g->cap)
        return 0;
    int64_t cap = g->cap ? g->cap : 4096;
    while (cap < g->len + more)
        cap *= 2;
    if (g->bytes == NULL) {
        g->bytes = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)cap);
        if (g->bytes == NULL)
            return -1;
    }
    else if (_PyBytes_Resize(&g->bytes, (Py_ssize_t)cap) < 0) {  /* frees it and sets NULL on failure */
        return -1;
    }
    g->cap = cap;
    return 0;
}

static int
grow_append(grow_t *g, const void *src, int64_t n)
{
    if (grow_reserve(g, n) < 0)
        return -1;
    if (n)
        memcpy(PyBytes_AS_STRING(g->bytes) + g->len, src, (size_t)n);
    g->len += n;
    return 0;
}

/* The buffer cut to its length, handed over (a new reference); g no longer holds it. */
static PyObject *
grow_finish(grow_t *g)
{
    if (g->bytes == NULL)
        return PyBytes_FromStringAndSize("", 0);
    if (g->len != g->cap && _PyBytes_Resize(&g->bytes, (Py_ssize_t)g->len) < 0)
        return NULL;
    PyObject *out = g->bytes;
    g->bytes = NULL;
    return out;
}

/* The element of a row: a bytes object that starts with prefix; its bytes after the prefix. 1
 * when it is one, 0 when it does not start with the prefix, -1 with TypeError when it is not
 * bytes. */
static int
element(PyObject *item, const Py_buffer *prefix, const char *what, const char **data, int64_t *n)
{
    if (!PyBytes_Check(item)) {
        PyErr_Format(PyExc_TypeError, "a row's %s is %.80s, not bytes", what, Py_TYPE(item)->tp_name);
        return -1;
    }
    int64_t len = (int64_t)PyBytes_GET_SIZE(item);
    const char *p = PyBytes_AS_STRING(item);
    if (len < (int64_t)prefix->len || (prefix->len && memcmp(p, prefix->buf, (size_t)prefix->len) != 0))
        return 0;
    *data = p + prefix->len;
    *n = len - (int64_t)prefix->len;
    return 1;
}

/* Append n bytes to data and their end offset to offsets. */
static int
take_bytes(const char *src, int64_t n, grow_t *offsets, grow_t *data, const char *what)
{
    if (n > (int64_t)INT32_MAX - data->len) {
        PyErr_Format(PyExc_OverflowError, "the %ss of one batch would reach 2**31 bytes", what);
        return -1;
    }
    if (grow_append(data, src, n) < 0)
        return -1;
    int32_t end = (int32_t)data->len;
    return grow_append(offsets, &end, 4);
}

/* Room for the rest of a batch, guessed from its first row: `limit` rows of that size, at most
 * max_bytes plus the row that crosses it, so a batch of even rows grows its buffer once, not
 * once per doubling (each a copy), and a batch of large rows asks no more than it may hold. */
static int
reserve_like(grow_t *g, int64_t row, Py_ssize_t limit, Py_ssize_t max_bytes)
{
    int64_t most = (int64_t)max_bytes < (int64_t)INT32_MAX ? (int64_t)max_bytes : (int64_t)INT32_MAX;
    int64_t rows = (int64_t)limit, want;
    if (row > 0 && rows > most / row + 1)
        want = most + row;
    else
        want = row * rows;  /* at most most + row: no overflow */
    if (want > (int64_t)INT32_MAX)
        want = (int64_t)INT32_MAX;
    return want > g->len ? grow_reserve(g, want - g->len) : 0;
}

PyDoc_STRVAR(collect_doc,
"collect(rows, limit, max_bytes, key_prefix=b'', value_prefix=b'')\n"
"    -> (count, key_offsets, keys, value_offsets, values, stray)\n\n"
"Up to limit (key, value) pairs of bytes from the iterator rows, stopping early once the keys or\n"
"the values taken reach max_bytes, as the int32 offsets and data of two Arrow binary arrays, each\n"
"key without key_prefix and each value without value_prefix. A row whose key or value does not\n"
"start with its prefix ends the batch untaken, as stray (else None).");

static PyObject *
collect(PyObject *module, PyObject *args)
{
    PyObject *rows;
    Py_ssize_t limit, max_bytes;
    Py_buffer kp = {0}, vp = {0};
    (void)module;
    if (!PyArg_ParseTuple(args, "Onn|y*y*:collect", &rows, &limit, &max_bytes, &kp, &vp))
        return NULL;
    grow_t ko = {0}, kd = {0}, vo = {0}, vd = {0};
    PyObject *out = NULL, *stray = NULL;
    Py_ssize_t count = 0;
    int32_t zero = 0;
    if (!PyIter_Check(rows)) {
        PyErr_SetString(PyExc_TypeError, "rows must be an iterator");
        goto done;
    }
    if (limit < 0 || max_bytes < 0) {
        PyErr_SetString(PyExc_ValueError, "limit and max_bytes must not be negative");
        goto done;
    }
    /* the offsets of a whole batch at once: limit + 1 of them, up to 64K rows' worth at first */
    if (grow_reserve(&ko, 4 * (int64_t)(limit < 65536 ? limit + 1 : 65537)) < 0
        || grow_reserve(&vo, 4 * (int64_t)(limit < 65536 ? limit + 1 : 65537)) < 0
        || grow_append(&ko, &zero, 4) < 0 || grow_append(&vo, &zero, 4) < 0)
        goto done;
    while (count < limit && kd.len < (int64_t)max_bytes && vd.len < (int64_t)max_bytes) {
        PyObject *item = PyIter_Next(rows);
        if (item == NULL) {
            if (PyErr_Occurred())
                goto done;
            break;
        }
        if (!PyTuple_Check(item) || PyTuple_GET_SIZE(item) != 2) {
            PyErr_Format(PyExc_TypeError, "a row is %.80s, not a (key, value) tuple", Py_TYPE(item)->tp_name);
            Py_DECREF(item);
            goto done;
        }
        const char *k = NULL, *v = NULL;
        int64_t kn = 0, vn = 0;
        int ks = element(PyTuple_GET_ITEM(item, 0), &kp, "key", &k, &kn);
        int vs = ks < 0 ? -1 : element(PyTuple_GET_ITEM(item, 1), &vp, "value", &v, &vn);
        if (vs < 0) {
            Py_DECREF(item);
            goto done;
        }
        if (ks == 0 || vs == 0) {
            stray = item;  /* handed over with the batch before it */
            break;
        }
        if (count == 0 && (reserve_like(&kd, kn, limit, max_bytes) < 0 || reserve_like(&vd, vn, limit, max_bytes) < 0)) {
            Py_DECREF(item);
            goto done;
        }
        int bad = take_bytes(k, kn, &ko, &kd, "key") < 0 || take_bytes(v, vn, &vo, &vd, "value") < 0;
        Py_DECREF(item);
        if (bad)
            goto done;
        count++;
    }
    {
        PyObject *parts[4] = {grow_finish(&ko), grow_finish(&kd), grow_finish(&vo), grow_finish(&vd)};
        if (parts[0] && parts[1] && parts[2] && parts[3])
            out = Py_BuildValue("(nNNNNO)", count, parts[0], parts[1], parts[2], parts[3], stray ? stray : Py_None);
        else
            for (int i = 0; i < 4; i++)
                Py_XDECREF(parts[i]);
    }
done:
    Py_XDECREF(stray);
    Py_XDECREF(ko.bytes);
    Py_XDECREF(kd.bytes);
    Py_XDECREF(vo.bytes);
    Py_XDECREF(vd.bytes);
    if (kp.obj)
        PyBuffer_Release(&kp);
    if (vp.obj)
        PyBuffer_Release(&vp);
    return out;
}

PyDoc_STRVAR(put_doc,
"put(target, key_prefix, value_prefix, key_offsets, keys, key_offset, keys_large, value_offsets,\n"
"    values, value_offset, values_large, count)\n\n"
"target[key_prefix + key] = value_prefix + value for each of count rows of an Arrow binary key\n"
"array and value array, in order.");

/* A new bytes object holding prefix then the n bytes at src; NULL with an exception set. */
static PyObject *
prefixed(const Py_buffer *prefix, const char *src, int64_t n)
{
    PyObject *out = PyBytes_FromStringAndSize(NULL, prefix->len + (Py_ssize_t)n);
    if (out != NULL) {
        char *w = PyBytes_AS_STRING(out);
        if (prefix->len)
            memcpy(w, prefix->buf, (size_t)prefix->len);
        if (n)
            memcpy(w + prefix->len, src, (size_t)n);
    }
    return out;
}

static PyObject *
put(PyObject *module, PyObject *args)
{
    (void)module;
    Py_ssize_t nargs = PyTuple_GET_SIZE(args);
    if (nargs != 12) {
        PyErr_Format(PyExc_TypeError, "put() takes 12 arguments (%zd given)", nargs);
        return NULL;
    }
    PyObject *target = PyTuple_GET_ITEM(args, 0);
    Py_buffer kp, vp;
    if (PyObject_GetBuffer(PyTuple_GET_ITEM(args, 1), &kp, PyBUF_SIMPLE) < 0)
        return NULL;
    if (PyObject_GetBuffer(PyTuple_GET_ITEM(args, 2), &vp, PyBUF_SIMPLE) < 0) {
        PyBuffer_Release(&kp);
        return NULL;
    }
    PyObject *rest = PyTuple_GetSlice(args, 3, nargs);
    binary_t keys, values;
    Py_ssize_t count = 0;
    int64_t key_bytes = 0, value_bytes = 0;
    int opened = rest == NULL ? -1 : open_rows(rest, "OOnpOOnpn:put", &keys, &values, &count, &key_bytes, &value_bytes);
    Py_XDECREF(rest);
    int failed = opened < 0;
    if (!failed) {
        const char *kdata = (const char *)keys.dv.buf, *vdata = (const char *)values.dv.buf;
        int64_t ks = offset_at(&keys, 0), vs = offset_at(&values, 0);
        for (int64_t i = 0; i < (int64_t)count && !failed; i++) {
            int64_t ke = offset_at(&keys, i + 1), ve = offset_at(&values, i + 1);
            PyObject *k = prefixed(&kp, kdata + ks, ke - ks);
            PyObject *v = k == NULL ? NULL : prefixed(&vp, vdata + vs, ve - vs);
            failed = v == NULL || PyObject_SetItem(target, k, v) < 0;
            Py_XDECREF(k);
            Py_XDECREF(v);
            ks = ke;
            vs = ve;
        }
        release_binary(&values);
        release_binary(&keys);
    }
    PyBuffer_Release(&vp);
    PyBuffer_Release(&kp);
    if (failed)
        return NULL;
    Py_RETURN_NONE;
}

static PyMethodDef rowpairs_methods[] = {
    {"collect", collect, METH_VARARGS, collect_doc},
    {"put", put, METH_VARARGS, put_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef rowpairs_module = {
    PyModuleDef_HEAD_INIT,
    "migrate.providers._rowpairs",
    "Rows between Arrow buffers and the RocksDB binding, compiled (see migrate.providers.rocksdb_db).",
    0,
    rowpairs_methods,
    NULL,
    NULL,
    NULL,
    NULL,
};

PyMODINIT_FUNC
PyInit__rowpairs(void)
{
    return PyModule_Create(&rowpairs_module);
}
