/* migrate.providers._rowpairs: the rows of a RocksDB scan into Arrow buffers, compiled.
 *
 * rocksdict (the binding) gives one Python bytes object per key and per value. Without this module
 * the tool appends each batch's keys and values to Python lists and converts them with pa.array:
 * migrate/providers/rocksdb_db.py:_collect_py, which stays the reference and the fallback when this
 * extension is not built (it is optional, see setup.py).
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
 * Bounds: lengths and running totals are int64_t and checked against INT32_MAX before they become
 * offsets. The loop calls into Python (the iterator), so it holds the GIL throughout.
 */

#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <stdint.h>
#include <stdlib.h>
#include <string.h>

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

static PyMethodDef rowpairs_methods[] = {
    {"collect", collect, METH_VARARGS, collect_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef rowpairs_module = {
    PyModuleDef_HEAD_INIT,
    "migrate.providers._rowpairs",
    "The rows of a RocksDB scan into Arrow buffers, compiled (see migrate.providers.rocksdb_db).",
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
