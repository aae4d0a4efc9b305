/* migrate.providers._rowpairs: rows between Arrow buffers and the RocksDB binding, compiled.
 *
 * rocksdict (the binding) gives and takes one Python bytes object per key and per value. Without
 * this module the tool appends each batch of a scan to Python lists and converts them with
 * pa.array, and writes a batch by prefixing its keys and values with Arrow, converting them with
 * to_pylist and looping over them in Python: migrate/providers/rocksdb_db.py:_collect_py and
 * _put_py, which stay the references and the fallbacks when this extension is not built (it is
 * optional, see setup.py).
 *
 * collect(rows, limit, max_bytes) -> (count, key_offsets, keys, value_offsets, values)
 *     rows: an iterator of (key, value) 2-tuples of bytes (rocksdict's items() view).
 *     Takes up to `limit` rows, and stops early once the keys or the values of the rows taken
 *     reach `max_bytes` bytes, so a batch of large rows stays bounded. Returns the keys and the
 *     values, each as the int32 offsets (native byte order) and the data of an Arrow binary array.
 *     A count below `limit` does not mean the iterator is exhausted; a count of 0 does (with
 *     limit > 0). An exception raised by the iterator propagates unchanged (rows it gave before
 *     are lost: the caller fails the read). Raises TypeError for an item that is not a 2-tuple of
 *     bytes, and OverflowError when a batch's keys or values would reach 2**31 bytes (the batch
 *     stops at max_bytes first, so only a row of 2**31 - max_bytes bytes or more gets there).
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

/* A growing byte buffer. */
typedef struct {
    char *data;
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
    char *data = realloc(g->data, (size_t)cap);
    if (data == NULL) {
        PyErr_NoMemory();
        return -1;
    }
    g->data = data;
    g->cap = cap;
    return 0;
}

static int
grow_append(grow_t *g, const void *src, int64_t n)
{
    if (grow_reserve(g, n) < 0)
        return -1;
    memcpy(g->data + g->len, src, (size_t)n);
    g->len += n;
    return 0;
}

/* Append one bytes object to data and its end offset to offsets. */
static int
take_bytes(PyObject *item, grow_t *offsets, grow_t *data, const char *what)
{
    if (!PyBytes_Check(item)) {
        PyErr_Format(PyExc_TypeError, "a row's %s is %.80s, not bytes", what, Py_TYPE(item)->tp_name);
        return -1;
    }
    int64_t n = (int64_t)PyBytes_GET_SIZE(item);
    if (n > (int64_t)INT32_MAX - data->len) {
        PyErr_Format(PyExc_OverflowError, "the %ss of one batch would reach 2**31 bytes", what);
        return -1;
    }
    if (grow_append(data, PyBytes_AS_STRING(item), n) < 0)
        return -1;
    int32_t end = (int32_t)data->len;
    return grow_append(offsets, &end, 4);
}

PyDoc_STRVAR(collect_doc,
"collect(rows, limit, max_bytes) -> (count, key_offsets, keys, value_offsets, values)\n\n"
"Up to limit (key, value) pairs of bytes from the iterator rows, stopping early once the keys or\n"
"the values taken reach max_bytes, as the int32 offsets and data of two Arrow binary arrays.");

static PyObject *
collect(PyObject *module, PyObject *args)
{
    PyObject *rows;
    Py_ssize_t limit, max_bytes;
    (void)module;
    if (!PyArg_ParseTuple(args, "Onn:collect", &rows, &limit, &max_bytes))
        return NULL;
    if (!PyIter_Check(rows)) {
        PyErr_SetString(PyExc_TypeError, "rows must be an iterator");
        return NULL;
    }
    if (limit < 0 || max_bytes < 0) {
        PyErr_SetString(PyExc_ValueError, "limit and max_bytes must not be negative");
        return NULL;
    }
    grow_t ko = {0}, kd = {0}, vo = {0}, vd = {0};
    int32_t zero = 0;
    PyObject *out = NULL;
    Py_ssize_t count = 0;
    if (grow_append(&ko, &zero, 4) < 0 || grow_append(&vo, &zero, 4) < 0)
        goto done;
    while (count < limit && kd.len < (int64_t)max_bytes && vd.len < (int64_t)max_bytes) {
        PyObject *item = PyIter_Next(rows);
        if (item == NULL) {
            if (PyErr_Occurred())
                goto done;
            break;
        }
        int bad = 0;
        if (!PyTuple_Check(item) || PyTuple_GET_SIZE(item) != 2) {
            PyErr_Format(PyExc_TypeError, "a row is %.80s, not a (key, value) tuple", Py_TYPE(item)->tp_name);
            bad = 1;
        }
        else {
            bad = take_bytes(PyTuple_GET_ITEM(item, 0), &ko, &kd, "key") < 0
                  || take_bytes(PyTuple_GET_ITEM(item, 1), &vo, &vd, "value") < 0;
        }
        Py_DECREF(item);
        if (bad)
            goto done;
        count++;
    }
    out = Py_BuildValue("(ny#y#y#y#)", count, ko.data, (Py_ssize_t)ko.len, kd.data ? kd.data : "",
                        (Py_ssize_t)kd.len, vo.data, (Py_ssize_t)vo.len, vd.data ? vd.data : "", (Py_ssize_t)vd.len);
done:
    free(ko.data);
    free(kd.data);
    free(vo.data);
    free(vd.data);
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
