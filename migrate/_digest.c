/* migrate._digest: the state digest of migrate/digest.py over one batch of rows, compiled.
 *
 * digest_rows(key_offsets, keys, key_offset, keys_large, value_offsets, values, value_offset,
 *             values_large, count) -> (lane_a, lane_b)
 *     The two 64-bit lane sums of count rows whose keys and values are the Arrow binary arrays
 *     given by their offsets and data buffers (int32 offsets, or int64 when *_large) and each
 *     array's slice offset. The algorithm is the one migrate/digest.py documents and computes with
 *     numpy (digest_batch_numpy, which stays the reference and the fallback when this extension
 *     is not built): per side, the bytes read as little-endian 64-bit words, the last one
 *     zero-padded, h = sum(w_j * P**j) mod 2**64 for each lane's odd multiplier P; then, per lane,
 *     a = mix(h_key ^ seed ^ len_key * GOLDEN), b = mix(h_value + len_value * GOLDEN + other seed),
 *     and the lane sums mix(a * P + b) over the rows, all mod 2**64 (unsigned arithmetic in C
 *     wraps exactly so: C11 6.2.5p9). mix is the splitmix64 finaliser (common practice; the
 *     constants are the ones in migrate/digest.py, checked by the unit tests against a
 *     plain-Python reference). Raises ValueError for offsets that do not describe an array over
 *     the data (see _binary.h), before reading a byte.
 *
 * numpy needs about a dozen whole-array passes per side (words, a gather per word position,
 * the mixing); this is one pass over the bytes, without the GIL.
 */

#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <stdint.h>
#include <string.h>

#include "providers/_binary.h"

static const uint64_t M1 = 0xBF58476D1CE4E5B9ULL;
static const uint64_t M2 = 0x94D049BB133111EBULL;
static const uint64_t GOLDEN = 0x9E3779B97F4A7C15ULL;
static const uint64_t LANE[2] = {0x100000001B3ULL, 0xC2B2AE3D27D4EB4FULL};
static const uint64_t SEED[2] = {0x243F6A8885A308D3ULL, 0x13198A2E03707344ULL};

static inline uint64_t
mix(uint64_t x)
{
    x ^= x >> 30;
    x *= M1;
    x ^= x >> 27;
    x *= M2;
    x ^= x >> 31;
    return x;
}

/* The little-endian 64-bit word of the `have` (1 or more; 8 are used) bytes at p, zero-padded. */
static inline uint64_t
word_le(const unsigned char *p, int64_t have)
{
    uint64_t w = 0;
#if defined(__BYTE_ORDER__) && defined(__ORDER_LITTLE_ENDIAN__) && __BYTE_ORDER__ == __ORDER_LITTLE_ENDIAN__
    if (have >= 8) {  /* a whole word on a little-endian machine: one load (memcpy: any alignment) */
        memcpy(&w, p, 8);
        return w;
    }
#endif
    for (int64_t j = (have < 8 ? have : 8) - 1; j >= 0; j--)
        w = (w << 8) | p[j];
    return w;
}

/* h of one side for both lanes. */
static inline void
side_hashes(const unsigned char *p, int64_t len, uint64_t *h0, uint64_t *h1)
{
    uint64_t a = 0, b = 0, pa = 1, pb = 1;
    for (int64_t at = 0; at < len; at += 8) {
        uint64_t w = word_le(p + at, len - at);
        a += w * pa;
        b += w * pb;
        pa *= LANE[0];
        pb *= LANE[1];
    }
    *h0 = a;
    *h1 = b;
}

PyDoc_STRVAR(digest_rows_doc,
"digest_rows(key_offsets, keys, key_offset, keys_large, value_offsets, values, value_offset,\n"
"            values_large, count, /) -> (lane_a, lane_b)\n"
"\n"
"The two lane sums of the state digest of count rows (see migrate/digest.py).");

static PyObject *
digest_rows(PyObject *module, PyObject *args)
{
    Py_ssize_t count;
    binary_t keys, values;
    int64_t key_bytes = 0, value_bytes = 0;

    (void)module;
    if (open_rows(args, "OOnpOOnpn:digest_rows", &keys, &values, &count, &key_bytes, &value_bytes) < 0)
        return NULL;
    uint64_t lane[2] = {0, 0};
    const unsigned char *kdata = (const unsigned char *)keys.dv.buf, *vdata = (const unsigned char *)values.dv.buf;
    Py_BEGIN_ALLOW_THREADS
    int64_t ks = offset_at(&keys, 0), vs = offset_at(&values, 0);
    for (int64_t i = 0; i < (int64_t)count; i++) {
        int64_t ke = offset_at(&keys, i + 1), ve = offset_at(&values, i + 1);
        uint64_t hk[2], hv[2];
        side_hashes(kdata + ks, ke - ks, &hk[0], &hk[1]);
        side_hashes(vdata + vs, ve - vs, &hv[0], &hv[1]);
        uint64_t klen = (uint64_t)(ke - ks) * GOLDEN, vlen = (uint64_t)(ve - vs) * GOLDEN;
        for (int l = 0; l < 2; l++) {
            uint64_t a = mix(hk[l] ^ SEED[l] ^ klen);
            uint64_t b = mix(hv[l] + vlen + SEED[1 - l]);
            lane[l] += mix(a * LANE[l] + b);
        }
        ks = ke;
        vs = ve;
    }
    Py_END_ALLOW_THREADS
    release_binary(&values);
    release_binary(&keys);
    return Py_BuildValue("(KK)", (unsigned long long)lane[0], (unsigned long long)lane[1]);
}

static PyMethodDef digest_methods[] = {
    {"digest_rows", digest_rows, METH_VARARGS, digest_rows_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef digest_module = {
    PyModuleDef_HEAD_INIT,
    "migrate._digest",
    "The state digest of one batch of rows, compiled (see migrate.digest).",
    0,
    digest_methods,
    NULL,
    NULL,
    NULL,
    NULL,
};

PyMODINIT_FUNC
PyInit__digest(void)
{
    return PyModule_Create(&digest_module);
}
