/* migrate.providers._framing: the record walk, gather and framing of heap-map state files, compiled.
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
 * gather_records(data, starts, large) -> (key_offsets, keys, value_offsets, values, removed)
 *     starts: the int64 offsets record_starts returned for the same data (any buffer of int64).
 *     Copies every key, and every value, into one contiguous buffer each, with the offsets of an
 *     Arrow binary array (int32; int64 when ``large``, for large_binary) and one byte per record
 *     that is 1 for a removal (whose value is empty). This is the gather that
 *     migrate/providers/hdfs.py:_record_arrays_py does with two Arrow ``take`` calls over the
 *     buffer viewed as alternating header / key / header / value elements; that stays the
 *     reference and the fallback. Raises ValueError when a start does not hold a record within
 *     the data (starts that did not come from record_starts); it never returns a partial result.
 *
 * gather_files(parts, offset_limit=2**31 - 1) -> (key_offsets, keys, value_offsets, values, removed, large)
 *     What gather_records gives for each file of a store partition's chain, joined: parts is a
 *     list of (data, starts) tuples in chain order. Every part is measured first, the five
 *     buffers are made once for all of them, and each part's records are copied straight into
 *     them, after the records of the parts before it; the part's list entry is then replaced by
 *     None, so a file nobody else holds is freed before the next one is copied. One copy of each
 *     record, where gather_records per file and a join made two (migrate/providers/hdfs.py:
 *     combine_files, the reference and the fallback). The offsets are int64 (large is True) when
 *     the keys or the values of all parts together exceed offset_limit bytes (2**31 - 1; tests
 *     lower it), int32 otherwise. Raises ValueError when a start does not hold a record within
 *     its data, and when a part's bytes change between the measure and the copy (the copy checks
 *     every length again, against its input and the room left in the output).
 *
 * frame_records(key_offsets, keys, key_offset, keys_large, value_offsets, values, value_offset,
 *               values_large, count) -> bytes
 *     The other direction, for the files this tool writes (no removals): the records of count
 *     rows from the buffers of an Arrow binary key array and value array (int32 offsets, or
 *     int64 when *_large) and each array's slice offset, without the end marker. This is what
 *     migrate/providers/hdfs.py:_frame_batch_py does with numpy scatters of every byte; that stays
 *     the reference and the fallback. Raises ValueError for offsets that do not describe an array
 *     over the data or an element of 2**31 bytes or more (its length cannot be an int32).
 *
 * take_binary(offsets, data, offset, large, count, positions) -> (offsets, data)
 *     The elements at positions (a buffer of int64, each in [0, count)) of an Arrow binary
 *     array's slice (its offsets and data buffers, slice offset, int64 offsets when ``large``), in
 *     that order, as a new array's offsets (same width) and data: what Arrow's ``take`` does, and
 *     stays the reference and the fallback of (migrate/providers/hdfs.py:take). It is here for the
 *     replay in key order, whose survivors lie scattered over the records: the loop asks for the
 *     memory of the element AHEAD positions on (and of its offsets before that), so the misses
 *     overlap. Raises ValueError for a position out of range or offsets that do not describe an
 *     array over the data (open_binary), before copying anything.
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

#include "_binary.h"

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

/* The i-th int64 of a buffer that may not be 8-byte aligned. */
static inline int64_t
start_at(const unsigned char *starts, int64_t i)
{
    int64_t v;
    memcpy(&v, starts + 8 * i, 8);
    return v;
}

/* Sizes of the keys and values at the given starts: 0, or -1 when a start does not hold a record
 * within n bytes. Needs no GIL. */
static int
measure(const unsigned char *buf, int64_t n, const unsigned char *starts, int64_t count, int64_t *key_bytes, int64_t *value_bytes)
{
    int64_t kb = 0, vb = 0;
    for (int64_t i = 0; i < count; i++) {
        int64_t pos = start_at(starts, i);
        if (pos < 0 || n - pos < 4)
            return -1;
        int64_t klen = be_int32(buf + pos);
        if (klen < 0 || n - pos - 4 < klen + 4)
            return -1;
        int64_t vpos = pos + 4 + klen;
        int64_t vlen = be_int32(buf + vpos);
        if (vlen == -1)
            vlen = 0;                             /* a removal: empty value */
        else if (vlen < 0 || n - vpos - 4 < vlen)
            return -1;
        kb += klen;                               /* each sum <= n: no overflow */
        vb += vlen;
    }
    *key_bytes = kb;
    *value_bytes = vb;
    return 0;
}

/* Copy the records at `count` starts of one file into the joined buffers, from record `first` and
 * from byte `*kat` / `*vat` of the keys / values on; offsets slot first + i + 1 gets each record's
 * end (slot `first` holds the end of the previous file already). Every length is read once and
 * checked against the input that remains and the room left in the output, so a buffer changed
 * since it was measured can only fail the call: -1, and what was copied is garbage the caller
 * drops. Needs no GIL. */
static int
fill_into(const unsigned char *buf, int64_t n, const unsigned char *starts, int64_t count, int large,
          char *koff, char *kout, int64_t kcap, char *voff, char *vout, int64_t vcap, char *removed,
          int64_t first, int64_t *kat_io, int64_t *vat_io)
{
    int64_t kat = *kat_io, vat = *vat_io;
    for (int64_t i = 0; i < count; i++) {
        int64_t pos = start_at(starts, i);
        if (pos < 0 || n - pos < 4)
            return -1;
        int64_t klen = be_int32(buf + pos);
        if (klen < 0 || n - pos - 4 < klen + 4)
            return -1;
        int64_t vpos = pos + 4 + klen;
        int64_t vlen = be_int32(buf + vpos);
        int gone = vlen == -1;
        if (gone)
            vlen = 0;                             /* a removal: empty value */
        else if (vlen < 0 || n - vpos - 4 < vlen)
            return -1;
        if (kcap - kat < klen || vcap - vat < vlen)
            return -1;
        memcpy(kout + kat, buf + pos + 4, (size_t)klen);
        kat += klen;
        if (vlen > 0)
            memcpy(vout + vat, buf + vpos + 4, (size_t)vlen);
        vat += vlen;
        removed[first + i] = (char)gone;
        int64_t slot = first + i + 1;
        if (large) {
            memcpy(koff + 8 * slot, &kat, 8);
            memcpy(voff + 8 * slot, &vat, 8);
        }
        else {
            int32_t k32 = (int32_t)kat, v32 = (int32_t)vat;  /* <= kcap, vcap <= INT32_MAX when !large */
            memcpy(koff + 4 * slot, &k32, 4);
            memcpy(voff + 4 * slot, &v32, 4);
        }
    }
    *kat_io = kat;
    *vat_io = vat;
    return 0;
}

/* The five buffers of a gather (gather_records, gather_files): key and value offsets (`width`
 * bytes each, slot 0 zeroed), key and value data, one removal byte per record. */
typedef struct {
    PyObject *koff, *kout, *voff, *vout, *removed;
} gathered_t;

/* 0, or -1 with MemoryError set (what was made is released by gathered_clear). */
static int
gathered_new(gathered_t *g, int64_t records, int64_t key_bytes, int64_t value_bytes, Py_ssize_t width)
{
    g->koff = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)(records + 1) * width);
    g->voff = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)(records + 1) * width);
    g->kout = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)key_bytes);
    g->vout = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)value_bytes);
    g->removed = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)records);
    if (!g->koff || !g->voff || !g->kout || !g->vout || !g->removed)
        return -1;
    memset(PyBytes_AS_STRING(g->koff), 0, (size_t)width);
    memset(PyBytes_AS_STRING(g->voff), 0, (size_t)width);
    return 0;
}

/* Copy `count` records at `starts` into g from record `first` and byte *kat / *vat on (fill_into,
 * without the GIL); *kat and *vat advance. */
static int
gathered_fill(gathered_t *g, const Py_buffer *view, const Py_buffer *sview, int64_t count, int large,
              int64_t first, int64_t *kat, int64_t *vat)
{
    int outcome;
    char *ko = PyBytes_AS_STRING(g->koff), *ki = PyBytes_AS_STRING(g->kout);
    char *vo = PyBytes_AS_STRING(g->voff), *vi = PyBytes_AS_STRING(g->vout), *rm = PyBytes_AS_STRING(g->removed);
    int64_t kcap = (int64_t)PyBytes_GET_SIZE(g->kout), vcap = (int64_t)PyBytes_GET_SIZE(g->vout);
    Py_BEGIN_ALLOW_THREADS
    outcome = fill_into((const unsigned char *)view->buf, (int64_t)view->len, (const unsigned char *)sview->buf,
                        count, large, ko, ki, kcap, vo, vi, vcap, rm, first, kat, vat);
    Py_END_ALLOW_THREADS
    return outcome;
}

static void
gathered_clear(gathered_t *g)
{
    Py_CLEAR(g->koff);
    Py_CLEAR(g->kout);
    Py_CLEAR(g->voff);
    Py_CLEAR(g->vout);
    Py_CLEAR(g->removed);
}

PyDoc_STRVAR(gather_records_doc,
"gather_records(data, starts, large, /) -> (key_offsets, keys, value_offsets, values, removed)\n"
"\n"
"The keys and the values at the record starts (from record_starts) of one decompressed heap-map\n"
"file, each as the offsets (int32, or int64 when large) and data buffers of an Arrow binary\n"
"array, plus one byte per record, 1 for a removal (its value is empty).");

static PyObject *
gather_records(PyObject *module, PyObject *args)
{
    PyObject *data, *starts_obj;
    int large;
    Py_buffer view, sview;
    int64_t key_bytes = 0, value_bytes = 0;
    int outcome;
    gathered_t g = {NULL, NULL, NULL, NULL, NULL};
    PyObject *result = NULL;

    (void)module;
    if (!PyArg_ParseTuple(args, "OOp:gather_records", &data, &starts_obj, &large))
        return NULL;
    if (PyObject_GetBuffer(data, &view, PyBUF_SIMPLE) < 0)
        return NULL;
    if (PyObject_GetBuffer(starts_obj, &sview, PyBUF_SIMPLE) < 0) {
        PyBuffer_Release(&view);
        return NULL;
    }
    if (sview.len % (Py_ssize_t)sizeof(int64_t) != 0) {
        PyErr_SetString(PyExc_ValueError, "starts must be a buffer of int64");
        goto done;
    }
    int64_t count = (int64_t)(sview.len / (Py_ssize_t)sizeof(int64_t));
    const unsigned char *buf = (const unsigned char *)view.buf;
    const unsigned char *starts = (const unsigned char *)sview.buf;  /* contiguous (PyBUF_SIMPLE) */
    Py_BEGIN_ALLOW_THREADS
    outcome = measure(buf, (int64_t)view.len, starts, count, &key_bytes, &value_bytes);
    Py_END_ALLOW_THREADS
    if (outcome != 0) {
        PyErr_SetString(PyExc_ValueError, "a start does not hold a record within the data");
        goto done;
    }
    if (!large && (key_bytes > INT32_MAX || value_bytes > INT32_MAX)) {
        PyErr_SetString(PyExc_ValueError, "the keys or values need 64-bit offsets (large)");
        goto done;
    }
    /* count + 1 <= view.len / 8 + 1, so the offset sizes fit in Py_ssize_t */
    int64_t kat = 0, vat = 0;
    if (gathered_new(&g, count, key_bytes, value_bytes, large ? 8 : 4) < 0)
        goto done;
    if (gathered_fill(&g, &view, &sview, count, large, 0, &kat, &vat) != 0 || kat != key_bytes || vat != value_bytes) {
        PyErr_SetString(PyExc_ValueError, "the data changed while its records were copied");
        goto done;
    }
    result = PyTuple_Pack(5, g.koff, g.kout, g.voff, g.vout, g.removed);
done:
    gathered_clear(&g);
    PyBuffer_Release(&sview);
    PyBuffer_Release(&view);
    return result;
}

/* ------------------------------------------------------------------------ gather_files */

/* The (data, starts) buffers of parts[i], a 2-tuple; -1 with an exception set otherwise (also
 * when the list no longer has an entry i: allocating can run a finaliser, which could shrink it). */
static int
part_buffers(PyObject *parts, Py_ssize_t i, Py_buffer *view, Py_buffer *sview)
{
    if (i >= PyList_GET_SIZE(parts)) {
        PyErr_SetString(PyExc_ValueError, "the list of parts changed while its records were copied");
        return -1;
    }
    PyObject *item = PyList_GET_ITEM(parts, i);
    if (!PyTuple_Check(item) || PyTuple_GET_SIZE(item) != 2) {
        PyErr_Format(PyExc_TypeError, "part %zd is not a (data, starts) tuple", i);
        return -1;
    }
    if (PyObject_GetBuffer(PyTuple_GET_ITEM(item, 0), view, PyBUF_SIMPLE) < 0)
        return -1;
    if (PyObject_GetBuffer(PyTuple_GET_ITEM(item, 1), sview, PyBUF_SIMPLE) < 0) {
        PyBuffer_Release(view);
        return -1;
    }
    if (sview->len % (Py_ssize_t)sizeof(int64_t) != 0) {
        PyBuffer_Release(sview);
        PyBuffer_Release(view);
        PyErr_SetString(PyExc_ValueError, "starts must be a buffer of int64");
        return -1;
    }
    return 0;
}

PyDoc_STRVAR(gather_files_doc,
"gather_files(parts, offset_limit=2**31 - 1, /) -> (key_offsets, keys, value_offsets, values, removed, large)\n"
"\n"
"The records of several decompressed heap-map files, one after the other, as one key array and\n"
"one value array (offsets and data buffers of Arrow binary arrays) plus one byte per record, 1\n"
"for a removal. parts: a list of (data, starts) tuples, starts from record_starts for the same\n"
"data; each entry is replaced by None once its records are copied. The offsets are int64 (large)\n"
"when the keys or the values of all parts exceed offset_limit bytes, else int32. ValueError when\n"
"a start does not hold a record within its data.");

static PyObject *
gather_files(PyObject *module, PyObject *args)
{
    PyObject *parts;
    gathered_t g = {NULL, NULL, NULL, NULL, NULL};
    PyObject *result = NULL;
    int64_t *sizes = NULL;                        /* per part: records, key bytes, value bytes */
    int64_t records = 0, key_bytes = 0, value_bytes = 0;
    Py_buffer view, sview;

    (void)module;
    long long offset_limit = INT32_MAX;
    if (!PyArg_ParseTuple(args, "O!|L:gather_files", &PyList_Type, &parts, &offset_limit))
        return NULL;
    if (offset_limit < 0 || offset_limit > INT32_MAX) {
        PyErr_SetString(PyExc_ValueError, "offset_limit must be in [0, 2**31 - 1]");
        return NULL;
    }
    Py_ssize_t nparts = PyList_GET_SIZE(parts);
    sizes = PyMem_Calloc((size_t)(nparts ? nparts : 1), 3 * sizeof(int64_t));
    if (sizes == NULL)
        return PyErr_NoMemory();
    for (Py_ssize_t i = 0; i < nparts; i++) {
        if (part_buffers(parts, i, &view, &sview) < 0)
            goto done;
        int64_t count = (int64_t)(sview.len / (Py_ssize_t)sizeof(int64_t)), kb = 0, vb = 0;
        int outcome;
        Py_BEGIN_ALLOW_THREADS
        outcome = measure((const unsigned char *)view.buf, (int64_t)view.len, (const unsigned char *)sview.buf, count, &kb, &vb);
        Py_END_ALLOW_THREADS
        PyBuffer_Release(&sview);
        PyBuffer_Release(&view);
        if (outcome != 0) {
            PyErr_SetString(PyExc_ValueError, "a start does not hold a record within the data");
            goto done;
        }
        sizes[3 * i] = count;                     /* each <= its buffer's length: the sums fit int64 */
        sizes[3 * i + 1] = kb;
        sizes[3 * i + 2] = vb;
        records += count;
        key_bytes += kb;
        value_bytes += vb;
    }
    int large = key_bytes > (int64_t)offset_limit || value_bytes > (int64_t)offset_limit;
    if (gathered_new(&g, records, key_bytes, value_bytes, large ? 8 : 4) < 0)
        goto done;
    int64_t first = 0, kat = 0, vat = 0;
    for (Py_ssize_t i = 0; i < nparts; i++) {
        if (part_buffers(parts, i, &view, &sview) < 0)
            goto done;
        int64_t count = (int64_t)(sview.len / (Py_ssize_t)sizeof(int64_t));
        int outcome = -1;
        if (count == sizes[3 * i] && records - first >= count)
            outcome = gathered_fill(&g, &view, &sview, count, large, first, &kat, &vat);
        PyBuffer_Release(&sview);
        PyBuffer_Release(&view);
        if (outcome != 0) {
            PyErr_SetString(PyExc_ValueError, "a part changed while its records were copied");
            goto done;
        }
        first += count;
        Py_INCREF(Py_None);
        if (PyList_SetItem(parts, i, Py_None) < 0)  /* steals the reference; frees the part if unheld */
            goto done;
    }
    if (first != records || kat != key_bytes || vat != value_bytes) {
        PyErr_SetString(PyExc_ValueError, "the parts changed while their records were copied");
        goto done;
    }
    result = Py_BuildValue("(OOOOOO)", g.koff, g.kout, g.voff, g.vout, g.removed, large ? Py_True : Py_False);
done:
    gathered_clear(&g);
    PyMem_Free(sizes);
    return result;
}

/* ------------------------------------------------------------------------ take (replay) */

/* How far ahead take_side asks for memory: the data of the row AHEAD rows on, and the offsets of
 * the row 2 * AHEAD rows on (the data's address needs them first). */
#define AHEAD 8

static inline const unsigned char *
offset_slot(const binary_t *b, int64_t i)
{
    return b->obase + (b->large ? 8 : 4) * i;
}

/* Copy the elements at pos[0..m) of one array into ooff and odata (sized by the caller). Needs no
 * GIL. */
static void
take_side(const binary_t *b, const int64_t *pos, int64_t m, char *ooff, char *odata)
{
    const unsigned char *data = (const unsigned char *)b->dv.buf;
    int64_t at = 0;
    for (int64_t i = 0; i < m; i++) {
        if (i + 2 * AHEAD < m)
            __builtin_prefetch(offset_slot(b, pos[i + 2 * AHEAD]));
        if (i + AHEAD < m)
            __builtin_prefetch(data + offset_at(b, pos[i + AHEAD]));
        int64_t s = offset_at(b, pos[i]), e = offset_at(b, pos[i] + 1);
        if (b->large)
            memcpy(ooff + 8 * i, &at, 8);
        else {
            int32_t a32 = (int32_t)at;  /* at most the input's bytes, < 2**31 for int32 offsets */
            memcpy(ooff + 4 * i, &a32, 4);
        }
        memcpy(odata + at, data + s, (size_t)(e - s));
        at += e - s;
    }
    if (b->large)
        memcpy(ooff + 8 * m, &at, 8);
    else {
        int32_t a32 = (int32_t)at;
        memcpy(ooff + 4 * m, &a32, 4);
    }
}

PyDoc_STRVAR(take_binary_doc,
"take_binary(offsets, data, offset, large, count, positions, /) -> (offsets, data)\n"
"\n"
"The elements at positions (int64, each in [0, count)) of an Arrow binary array's slice, in that\n"
"order, as the offsets (of the same width) and data buffers of a new array.");

static PyObject *
take_binary(PyObject *module, PyObject *args)
{
    PyObject *offsets_obj, *data_obj, *positions_obj;
    Py_ssize_t offset, count;
    int large;
    (void)module;
    if (!PyArg_ParseTuple(args, "OOnpnO:take_binary", &offsets_obj, &data_obj, &offset, &large, &count, &positions_obj))
        return NULL;
    if (count < 0) {
        PyErr_SetString(PyExc_ValueError, "count must not be negative");
        return NULL;
    }
    Py_buffer pview;
    if (PyObject_GetBuffer(positions_obj, &pview, PyBUF_SIMPLE) < 0)
        return NULL;
    binary_t arr;
    int64_t bytes = 0;
    if (open_binary(&arr, offsets_obj, data_obj, offset, large, (int64_t)count, &bytes, "array") < 0) {
        PyBuffer_Release(&pview);
        return NULL;
    }
    PyObject *ooff = NULL, *odata = NULL, *result = NULL;
    int64_t *pos = NULL;
    if (pview.len % (Py_ssize_t)sizeof(int64_t) != 0) {
        PyErr_SetString(PyExc_ValueError, "positions must be a buffer of int64");
        goto done;
    }
    int64_t m = (int64_t)(pview.len / (Py_ssize_t)sizeof(int64_t));
    pos = PyMem_RawMalloc((size_t)(m ? m : 1) * sizeof(int64_t));  /* aligned, for the loops */
    if (pos == NULL) {
        PyErr_NoMemory();
        goto done;
    }
    memcpy(pos, pview.buf, (size_t)m * sizeof(int64_t));
    int64_t total = 0;
    for (int64_t i = 0; i < m; i++) {
        int64_t p = pos[i];
        if (p < 0 || p >= (int64_t)count) {
            PyErr_Format(PyExc_ValueError, "position %lld is outside the %zd elements", (long long)p, count);
            goto done;
        }
        total += offset_at(&arr, p + 1) - offset_at(&arr, p);  /* each < 2**31, m of them: no overflow */
    }
    if (!large && total > INT32_MAX) {  /* elements taken more than once can outgrow the input */
        PyErr_SetString(PyExc_ValueError, "the elements taken need 64-bit offsets (large)");
        goto done;
    }
    ooff = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)((m + 1) * (large ? 8 : 4)));
    odata = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)total);
    if (ooff && odata) {
        char *o = PyBytes_AS_STRING(ooff), *d = PyBytes_AS_STRING(odata);
        Py_BEGIN_ALLOW_THREADS
        take_side(&arr, pos, m, o, d);
        Py_END_ALLOW_THREADS
        result = PyTuple_Pack(2, ooff, odata);
    }
done:
    PyMem_RawFree(pos);
    Py_XDECREF(ooff);
    Py_XDECREF(odata);
    release_binary(&arr);
    PyBuffer_Release(&pview);
    return result;
}

/* ------------------------------------------------------------------------ framing (writing) */

static inline void
put_be_int32(unsigned char *p, int64_t v)  /* 0 <= v <= INT32_MAX */
{
    uint32_t u = (uint32_t)v;
    p[0] = (unsigned char)(u >> 24);
    p[1] = (unsigned char)(u >> 16);
    p[2] = (unsigned char)(u >> 8);
    p[3] = (unsigned char)u;
}

PyDoc_STRVAR(frame_records_doc,
"frame_records(key_offsets, keys, key_offset, keys_large, value_offsets, values, value_offset,\n"
"              values_large, count, /) -> bytes\n"
"\n"
"The records (int32 BE key length, key, int32 BE value length, value) of count rows, from the\n"
"offsets and data buffers of an Arrow binary key array and value array (int32 offsets, or int64\n"
"when *_large) and each array's slice offset; no end marker. The inverse of gather_records for\n"
"files without removals. Raises ValueError for offsets that do not describe such an array or\n"
"an element of 2**31 bytes or more.");

static PyObject *
frame_records(PyObject *module, PyObject *args)
{
    Py_ssize_t count;
    binary_t keys, values;
    int64_t key_bytes = 0, value_bytes = 0;

    (void)module;
    if (open_rows(args, "OOnpOOnpn:frame_records", &keys, &values, &count, &key_bytes, &value_bytes) < 0)
        return NULL;
    /* each sum is within its data buffer, and count <= each offsets buffer's length / 4 */
    PyObject *out = PyBytes_FromStringAndSize(NULL, (Py_ssize_t)(8 * (int64_t)count + key_bytes + value_bytes));
    if (out != NULL) {
        unsigned char *w = (unsigned char *)PyBytes_AS_STRING(out);
        const unsigned char *kdata = (const unsigned char *)keys.dv.buf, *vdata = (const unsigned char *)values.dv.buf;
        Py_BEGIN_ALLOW_THREADS
        int64_t ks = offset_at(&keys, 0), vs = offset_at(&values, 0);
        for (int64_t i = 0; i < (int64_t)count; i++) {
            int64_t ke = offset_at(&keys, i + 1), ve = offset_at(&values, i + 1);
            put_be_int32(w, ke - ks);
            memcpy(w + 4, kdata + ks, (size_t)(ke - ks));
            w += 4 + (ke - ks);
            put_be_int32(w, ve - vs);
            memcpy(w + 4, vdata + vs, (size_t)(ve - vs));
            w += 4 + (ve - vs);
            ks = ke;
            vs = ve;
        }
        Py_END_ALLOW_THREADS
    }
    release_binary(&values);
    release_binary(&keys);
    return out;
}

static PyMethodDef framing_methods[] = {
    {"take_binary", take_binary, METH_VARARGS, take_binary_doc},
    {"record_starts", record_starts, METH_VARARGS, record_starts_doc},
    {"gather_records", gather_records, METH_VARARGS, gather_records_doc},
    {"gather_files", gather_files, METH_VARARGS, gather_files_doc},
    {"frame_records", frame_records, METH_VARARGS, frame_records_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef framing_module = {
    PyModuleDef_HEAD_INIT,
    "migrate.providers._framing",
    "The record walk, gather and framing of heap-map state files, compiled (see migrate.providers.hdfs).",
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
