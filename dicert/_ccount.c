/* Counting kernel for dicert trial codes (one byte per trial).
 *
 * count_blocks(codes, block_len, out) counts the 32 code values (code & 0x1F) in each block of
 * block_len trials, adding into `out` (a writable buffer of int64, nblocks * 32 entries), and
 * returns the bitwise OR of every byte so that the caller can detect reserved bits.
 * Four interleaved histograms break the store-to-load dependency on repeated codes.
 * The GIL is released while counting, so hashing in another thread runs concurrently.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>
#include <string.h>

static PyObject *count_blocks(PyObject *self, PyObject *args) {
    Py_buffer codes, out;
    Py_ssize_t block_len;
    if (!PyArg_ParseTuple(args, "y*nw*", &codes, &block_len, &out)) return NULL;
    Py_ssize_t n = codes.len;
    if (block_len <= 0) {
        PyBuffer_Release(&codes); PyBuffer_Release(&out);
        PyErr_SetString(PyExc_ValueError, "block_len must be positive");
        return NULL;
    }
    Py_ssize_t nblocks = n ? (n + block_len - 1) / block_len : 1;
    if (out.len < (Py_ssize_t)(nblocks * 32 * sizeof(int64_t))) {
        PyBuffer_Release(&codes); PyBuffer_Release(&out);
        PyErr_SetString(PyExc_ValueError, "output buffer too small");
        return NULL;
    }
    const uint8_t *c = (const uint8_t *)codes.buf;
    int64_t *o = (int64_t *)out.buf;
    unsigned int acc = 0;
    Py_BEGIN_ALLOW_THREADS
    uint64_t h[4][256];
    for (Py_ssize_t k = 0; k < nblocks; k++) {
        Py_ssize_t lo = k * block_len;
        Py_ssize_t hi = lo + block_len < n ? lo + block_len : n;
        memset(h, 0, sizeof(h));
        Py_ssize_t i = lo;
        uint8_t a0 = 0, a1 = 0, a2 = 0, a3 = 0;
        for (; i + 4 <= hi; i += 4) {
            uint8_t c0 = c[i], c1 = c[i + 1], c2 = c[i + 2], c3 = c[i + 3];
            h[0][c0]++; h[1][c1]++; h[2][c2]++; h[3][c3]++;
            a0 |= c0; a1 |= c1; a2 |= c2; a3 |= c3;
        }
        for (; i < hi; i++) { h[0][c[i]]++; a0 |= c[i]; }
        acc |= (unsigned int)(a0 | a1 | a2 | a3);
        for (int v = 0; v < 256; v++)
            o[k * 32 + (v & 31)] += (int64_t)(h[0][v] + h[1][v] + h[2][v] + h[3][v]);
    }
    Py_END_ALLOW_THREADS
    PyBuffer_Release(&codes);
    PyBuffer_Release(&out);
    return PyLong_FromUnsignedLong(acc);
}

/* count_pairs(codes, prev, out) adds the counts of consecutive settings symbols into `out`
 * (int64, 64 entries, index 8 * previous + current) where a trial's symbol is
 * (code >> 2) & 7 = (t, x, y). `prev` is the symbol of the trial before codes[0] (-1: none).
 * Returns the symbol of the last trial (or prev when codes is empty). */
static PyObject *count_pairs(PyObject *self, PyObject *args) {
    Py_buffer codes, out;
    int prev;
    if (!PyArg_ParseTuple(args, "y*iw*", &codes, &prev, &out)) return NULL;
    if (out.len < (Py_ssize_t)(64 * sizeof(int64_t))) {
        PyBuffer_Release(&codes); PyBuffer_Release(&out);
        PyErr_SetString(PyExc_ValueError, "output buffer too small");
        return NULL;
    }
    const uint8_t *c = (const uint8_t *)codes.buf;
    int64_t *o = (int64_t *)out.buf;
    Py_ssize_t n = codes.len;
    int last = prev;
    if (n > 0) {
        Py_BEGIN_ALLOW_THREADS
        uint64_t h[4][64];
        memset(h, 0, sizeof(h));
        if (prev >= 0) h[0][((prev & 7) << 3) | ((c[0] >> 2) & 7)]++;
        Py_ssize_t i = 1;
        for (; i + 4 <= n; i += 4) {
            unsigned s0 = (c[i - 1] >> 2) & 7, s1 = (c[i] >> 2) & 7, s2 = (c[i + 1] >> 2) & 7,
                     s3 = (c[i + 2] >> 2) & 7, s4 = (c[i + 3] >> 2) & 7;
            h[0][(s0 << 3) | s1]++; h[1][(s1 << 3) | s2]++;
            h[2][(s2 << 3) | s3]++; h[3][(s3 << 3) | s4]++;
        }
        for (; i < n; i++) h[0][(((c[i - 1] >> 2) & 7) << 3) | ((c[i] >> 2) & 7)]++;
        for (int v = 0; v < 64; v++) o[v] += (int64_t)(h[0][v] + h[1][v] + h[2][v] + h[3][v]);
        last = (c[n - 1] >> 2) & 7;
        Py_END_ALLOW_THREADS
    }
    PyBuffer_Release(&codes);
    PyBuffer_Release(&out);
    return PyLong_FromLong(last);
}

static PyMethodDef methods[] = {
    {"count_pairs", count_pairs, METH_VARARGS,
     "count_pairs(codes, prev, out) -> last: add counts of consecutive settings symbols into out."},
    {"count_blocks", count_blocks, METH_VARARGS,
     "count_blocks(codes, block_len, out) -> or_all: add per-block counts of the 32 codes into out."},
    {NULL, NULL, 0, NULL}};

static struct PyModuleDef moduledef = {PyModuleDef_HEAD_INIT, "_ccount", NULL, -1, methods};

PyMODINIT_FUNC PyInit__ccount(void) { return PyModule_Create(&moduledef); }
