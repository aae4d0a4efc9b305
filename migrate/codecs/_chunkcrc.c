/* migrate.codecs._chunkcrc: the per-chunk CRC-32 of a Hadoop checksum sidecar, compiled.
 *
 * chunk_crcs(data, bytes_per_checksum) -> bytes
 *     The CRC-32 of every bytes_per_checksum slice of data (the last slice may be shorter; none
 *     for empty data), each as a big-endian uint32, concatenated: the body of the sidecar that
 *     migrate/codecs/hadoop_crc.py describes. The CRC is zlib's crc32 (the plain CRC-32
 *     polynomial, the one the engine's sidecars carry; observed), called once per slice without
 *     the GIL. hadoop_crc.chunk_crcs_py (zlib.crc32 mapped over memoryview slices) stays the
 *     reference and the fallback when this extension is not built. Raises ValueError for a
 *     bytes_per_checksum that is not positive.
 *
 * Python's loop costs about 0.8 us per 512-byte slice besides the CRC itself (measured: 0.46
 * GB/s against 1.8 GB/s for one zlib.crc32 over the same 64 MiB); here each slice costs the CRC.
 */

#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <stdint.h>
#include <zlib.h>

static PyObject *
chunk_crcs(PyObject *self, PyObject *args)
{
    Py_buffer data;
    Py_ssize_t step;
    if (!PyArg_ParseTuple(args, "y*n", &data, &step))
        return NULL;
    if (step <= 0) {
        PyBuffer_Release(&data);
        PyErr_Format(PyExc_ValueError, "bytes per checksum must be positive, got %zd", step);
        return NULL;
    }
    if (step > (Py_ssize_t)UINT_MAX) {  /* zlib's crc32 takes a uInt length */
        PyBuffer_Release(&data);
        PyErr_Format(PyExc_ValueError, "bytes per checksum %zd is larger than one zlib call takes", step);
        return NULL;
    }
    Py_ssize_t len = data.len;
    Py_ssize_t chunks = len / step + (len % step != 0);
    PyObject *out = PyBytes_FromStringAndSize(NULL, chunks * 4);
    if (out == NULL) {
        PyBuffer_Release(&data);
        return NULL;
    }
    unsigned char *dst = (unsigned char *)PyBytes_AS_STRING(out);
    const unsigned char *src = (const unsigned char *)data.buf;
    Py_BEGIN_ALLOW_THREADS
    for (Py_ssize_t i = 0; i < chunks; i++) {
        Py_ssize_t start = i * step;
        Py_ssize_t n = len - start < step ? len - start : step;
        uint32_t crc = (uint32_t)crc32(0L, src + start, (uInt)n);
        dst[4 * i] = (unsigned char)(crc >> 24);
        dst[4 * i + 1] = (unsigned char)(crc >> 16);
        dst[4 * i + 2] = (unsigned char)(crc >> 8);
        dst[4 * i + 3] = (unsigned char)crc;
    }
    Py_END_ALLOW_THREADS
    PyBuffer_Release(&data);
    return out;
}

static PyMethodDef methods[] = {
    {"chunk_crcs", chunk_crcs, METH_VARARGS,
     "chunk_crcs(data, bytes_per_checksum) -> the big-endian CRC-32 of each slice, concatenated"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_chunkcrc", NULL, -1, methods};

PyMODINIT_FUNC
PyInit__chunkcrc(void)
{
    return PyModule_Create(&module);
}
