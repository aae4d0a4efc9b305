/* Shared by the compiled helpers (_framing.c, _keysort.c, _rowpairs.c, ../_digest.c,
 * ../rows/_flatrows.c): one Arrow binary array's offsets and data buffers, exported through the
 * buffer protocol and checked before any use.
 *
 * open_binary checks every offset of the array's slice in 64-bit arithmetic (from 0 or more,
 * never decreasing, the last within the data, every element shorter than 2**31 bytes) before the
 * caller reads a byte; offset_at reads offsets that need not be aligned. The buffers stay valid
 * until release_binary (the buffer protocol's contract, CPython docs "Buffer Protocol").
 */

#ifndef STATESHIFT_BINARY_H
#define STATESHIFT_BINARY_H

#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <stdint.h>
#include <string.h>

/* One binary array's offsets and data, exported. */
typedef struct {
    Py_buffer ov, dv;
    int have_ov, have_dv;
    const unsigned char *obase;  /* the offsets of the array's slice, possibly unaligned */
    int large;
} binary_t;

static inline int64_t
offset_at(const binary_t *b, int64_t i)
{
    if (b->large) {
        int64_t v;
        memcpy(&v, b->obase + 8 * i, 8);
        return v;
    }
    int32_t v;
    memcpy(&v, b->obase + 4 * i, 4);
    return (int64_t)v;
}

static inline void
release_binary(binary_t *b)
{
    if (b->have_dv)
        PyBuffer_Release(&b->dv);
    if (b->have_ov)
        PyBuffer_Release(&b->ov);
    b->have_dv = b->have_ov = 0;
}

/* Export the buffers of one array's slice [offset, offset + count) and check its offsets: from
 * 0 or more, never decreasing, within the data, every element shorter than 2**31 (a record's
 * lengths are int32). On failure an exception is set, nothing is left exported, and -1 is
 * returned; *bytes is the data the slice covers. */
static inline int
open_binary(binary_t *b, PyObject *offsets, PyObject *data, Py_ssize_t offset, int large, int64_t count,
            int64_t *bytes, const char *what)
{
    memset(b, 0, sizeof(*b));
    b->large = large;
    if (offset < 0) {
        PyErr_Format(PyExc_ValueError, "the %s offset must not be negative", what);
        return -1;
    }
    if (PyObject_GetBuffer(offsets, &b->ov, PyBUF_SIMPLE) < 0)
        return -1;
    b->have_ov = 1;
    if (PyObject_GetBuffer(data, &b->dv, PyBUF_SIMPLE) < 0) {
        release_binary(b);
        return -1;
    }
    b->have_dv = 1;
    int64_t width = large ? 8 : 4;
    int64_t have = (int64_t)b->ov.len / width;  /* offsets in the buffer; offset, count >= 0 */
    if ((int64_t)offset >= have || count > have - (int64_t)offset - 1) {  /* no overflow: all terms <= have */
        PyErr_Format(PyExc_ValueError, "the %s offsets buffer is shorter than the slice needs", what);
        release_binary(b);
        return -1;
    }
    b->obase = (const unsigned char *)b->ov.buf + (int64_t)offset * width;
    int64_t prev = offset_at(b, 0);
    int bad = prev < 0;
    for (int64_t i = 1; i <= count && !bad; i++) {
        int64_t o = offset_at(b, i);
        bad = o < prev || o - prev > INT32_MAX;
        prev = o;
    }
    if (bad || prev > (int64_t)b->dv.len) {
        PyErr_Format(PyExc_ValueError, "the %s offsets are not those of a binary array over the data "
                     "with elements shorter than 2**31 bytes", what);
        release_binary(b);
        return -1;
    }
    *bytes = prev - offset_at(b, 0);
    return 0;
}

/* Parse the arguments (key_offsets, keys, key_offset, keys_large, value_offsets, values,
 * value_offset, values_large, count) with `format` ("OOnpOOnpn:<name>") and open both arrays'
 * slices of count rows. On failure an exception is set, nothing is left exported, and -1 is
 * returned; release both with release_binary. */
static inline int
open_rows(PyObject *args, const char *format, binary_t *keys, binary_t *values, Py_ssize_t *count,
          int64_t *key_bytes, int64_t *value_bytes)
{
    PyObject *ko, *kd, *vo, *vd;
    Py_ssize_t koffset, voffset;
    int klarge, vlarge;
    if (!PyArg_ParseTuple(args, format, &ko, &kd, &koffset, &klarge, &vo, &vd, &voffset, &vlarge, count))
        return -1;
    if (*count < 0) {
        PyErr_SetString(PyExc_ValueError, "count must not be negative");
        return -1;
    }
    if (open_binary(keys, ko, kd, koffset, klarge, (int64_t)*count, key_bytes, "key") < 0)
        return -1;
    if (open_binary(values, vo, vd, voffset, vlarge, (int64_t)*count, value_bytes, "value") < 0) {
        release_binary(keys);
        return -1;
    }
    return 0;
}

#endif /* STATESHIFT_BINARY_H */
