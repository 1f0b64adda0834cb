/* Two inner loops of the beamformer, compiled (see DEVELOPERS.md, "The compiled kernels").
 *
 * numpy forms the same sums in beamformer.py; these loops exist because there
 * the per-bin products are thousands of tiny matrix products (one BLAS call
 * each, mostly call overhead) and the history write is a transpose plus a
 * pass per operation. Both loops work on the arrays in the layout the engine
 * already has, so nothing is transposed or copied on the way in or out.
 *
 * Only the CPython buffer protocol is used (no numpy headers): the Python side
 * passes C-contiguous float32 / complex64 / int32 arrays and their shapes, and
 * checks them before the call.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <string.h>

/* Beams per vector: the steering matrices hold beams padded to a multiple of this. */
#define LANES 8
typedef float v8 __attribute__((vector_size(4 * LANES)));

#if defined(__GNUC__) && defined(__x86_64__) && !defined(__clang__)
/* One clone for AVX2 with FMA, one for any x86-64; chosen once at load (glibc ifunc). */
#define CLONES __attribute__((target_clones("arch=x86-64-v3", "default")))
#else
#define CLONES
#endif

static inline __attribute__((always_inline)) v8 load8(const float *p)
{
    v8 v;
    memcpy(&v, p, sizeof v);
    return v;
}

/* Most blocks accumulated at once (their accumulators stay in registers). */
#define MAX_BLOCKS 4

/* Accumulate rows [r0, r1) of bin kk into one group of LANES beams, for nk
 * blocks of spectra (v + j * block_stride floats is block j). With one block,
 * even and odd rows go to separate accumulators so that two chains of adds
 * are in flight per output. ``turn`` multiplies the spectra by j. nk is a
 * constant at every call, so the loops over blocks unroll. */
static inline __attribute__((always_inline)) void group_rows(
    const float *h_re, const float *h_im, const float *v, Py_ssize_t v_bins, Py_ssize_t block_stride,
    Py_ssize_t kk, Py_ssize_t r0, Py_ssize_t r1, Py_ssize_t stride, int turn, const int nk, const int cplx,
    v8 *ar, v8 *ai)
{
    const int par = nk == 1 ? 2 : 1;
    v8 xr[MAX_BLOCKS] = {{0}}, xi[MAX_BLOCKS] = {{0}};
    Py_ssize_t r = r0;
    for (; r + par <= r1; r += par) {
        for (int p = 0; p < par; p++) {
            v8 h = load8(h_re + (r + p) * stride), g = {0};
            if (cplx)
                g = load8(h_im + (r + p) * stride);
            for (int j = 0; j < nk; j++) {
                const float *s = v + j * block_stride + 2 * ((r + p) * v_bins + kk);
                float sr = turn ? -s[1] : s[0], si = turn ? s[0] : s[1];
                int a = p + j;
                xr[a] += h * sr;
                xi[a] += h * si;
                if (cplx) {
                    xr[a] -= g * si;
                    xi[a] += g * sr;
                }
            }
        }
    }
    for (; r < r1; r++) {
        v8 h = load8(h_re + r * stride), g = {0};
        if (cplx)
            g = load8(h_im + r * stride);
        for (int j = 0; j < nk; j++) {
            const float *s = v + j * block_stride + 2 * (r * v_bins + kk);
            float sr = turn ? -s[1] : s[0], si = turn ? s[0] : s[1];
            xr[j] += h * sr;
            xi[j] += h * si;
            if (cplx) {
                xr[j] -= g * si;
                xi[j] += g * sr;
            }
        }
    }
    for (int j = 0; j < nk; j++) {
        ar[j] += xr[j] + (nk == 1 ? xr[1] : (v8){0});
        ai[j] += xi[j] + (nk == 1 ? xi[1] : (v8){0});
    }
}

/* One bin, one group of beams, nk blocks: y[j, b0 + b, k] for b < nb. */
static inline __attribute__((always_inline)) void bin_group(
    const float *hr, const float *hi, const float *v, Py_ssize_t v_bins, Py_ssize_t block_stride, Py_ssize_t kk,
    Py_ssize_t n_rows, Py_ssize_t n_plain, Py_ssize_t stride, const int nk, const int cplx, float *y,
    const int *main_out, const int *mirror_out, Py_ssize_t n_out, Py_ssize_t n_bins, Py_ssize_t nb)
{
    /* a: the plain rows' sum, then t: the turned rows' sum; beam = a + t, its mirror image a - t */
    v8 a_re[MAX_BLOCKS] = {{0}}, a_im[MAX_BLOCKS] = {{0}}, t_re[MAX_BLOCKS] = {{0}}, t_im[MAX_BLOCKS] = {{0}};
    group_rows(hr, hi, v, v_bins, block_stride, kk, 0, n_plain, stride, 0, nk, cplx, a_re, a_im);
    group_rows(hr, hi, v, v_bins, block_stride, kk, n_plain, n_rows, stride, 1, nk, cplx, t_re, t_im);
    for (int j = 0; j < nk; j++) {
        v8 p_re = a_re[j] + t_re[j], p_im = a_im[j] + t_im[j];
        v8 m_re = a_re[j] - t_re[j], m_im = a_im[j] - t_im[j];
        for (Py_ssize_t b = 0; b < nb; b++) {
            float *out = y + 2 * ((j * n_out + main_out[b]) * n_bins);
            out[0] = p_re[b];
            out[1] = p_im[b];
            if (mirror_out[b] >= 0) {
                out = y + 2 * ((j * n_out + mirror_out[b]) * n_bins);
                out[0] = m_re[b];
                out[1] = m_im[b];
            }
        }
    }
}

/* y[j, b, k] = sum_r h[k, r, b] v[j, r, k0 + k] over blocks j, beams b, bins k.
 * h_re, h_im: float32 (beam groups, bins, rows, LANES), the beams padded to
 * whole groups, h_im NULL for a real steering matrix; v: complex64 (blocks,
 * rows, v_bins) interleaved; rows r >= n_plain are multiplied by j first (the
 * difference rows of mirror pairs); y: complex64 (blocks, n_out, bins).
 * Beam b is written to output beam main_out[b]; where mirror_out[b] >= 0,
 * the sum with the turned rows' part negated goes to output beam
 * mirror_out[b] (the mirror-image direction of a symmetric array, whose
 * steering on the pair rows is the same but for the sign of the difference
 * rows), so one pass forms both.
 *
 * Loop order: a group's steering is read once, front to back, for up to
 * MAX_BLOCKS blocks; bins run inside groups so that the output lines being
 * written (one per beam and block) stay in the first-level cache. */
CLONES static void steer(const float *h_re, const float *h_im, const float *v, Py_ssize_t n_blocks,
                         Py_ssize_t v_bins, Py_ssize_t k0, Py_ssize_t n_bins, Py_ssize_t n_rows,
                         Py_ssize_t n_plain, Py_ssize_t n_beams, const int *main_out, const int *mirror_out,
                         Py_ssize_t n_out, float *y)
{
    Py_ssize_t block_stride = 2 * n_rows * v_bins;
    Py_ssize_t group_size = n_bins * n_rows * LANES;
    for (Py_ssize_t j0 = 0; j0 < n_blocks; j0 += MAX_BLOCKS) {
        Py_ssize_t nk = n_blocks - j0 < MAX_BLOCKS ? n_blocks - j0 : MAX_BLOCKS;
        const float *vj = v + j0 * block_stride;
        float *yj = y + 2 * j0 * n_out * n_bins;
        for (Py_ssize_t b0 = 0; b0 < n_beams; b0 += LANES) {
            Py_ssize_t nb = n_beams - b0 < LANES ? n_beams - b0 : LANES;
            for (Py_ssize_t k = 0; k < n_bins; k++) {
                const float *hr = h_re + (b0 / LANES) * group_size + k * n_rows * LANES;
                const float *hi = h_im == NULL ? NULL : h_im + (b0 / LANES) * group_size + k * n_rows * LANES;
                float *yk = yj + 2 * k;
#define BIN_GROUP(NK, CPLX) bin_group(hr, hi, vj, v_bins, block_stride, k0 + k, n_rows, n_plain, LANES, NK, CPLX, \
                                     yk, main_out + b0, mirror_out + b0, n_out, n_bins, nb)
                if (hi == NULL) {
                    switch (nk) {
                    case 1: BIN_GROUP(1, 0); break;
                    case 2: BIN_GROUP(2, 0); break;
                    case 3: BIN_GROUP(3, 0); break;
                    default: BIN_GROUP(4, 0); break;
                    }
                } else {
                    switch (nk) {
                    case 1: BIN_GROUP(1, 1); break;
                    case 2: BIN_GROUP(2, 1); break;
                    case 3: BIN_GROUP(3, 1); break;
                    default: BIN_GROUP(4, 1); break;
                    }
                }
#undef BIN_GROUP
            }
        }
    }
}

/* out[r, col + f] = ca[r] x[f, ia[r]] + cb[r] x[f, ib[r]]: history rows from
 * input frames x (frames, channels), float32; out is (n_rows, out_cols). Frames
 * go in tiles so that a tile of x stays in the first-level cache while every
 * row reads it. */
#define FRAME_TILE 64
CLONES static void rows(const float *x, Py_ssize_t frames, Py_ssize_t channels, const int *ia, const int *ib,
                        const float *ca, const float *cb, Py_ssize_t n_rows, float *out, Py_ssize_t out_cols,
                        Py_ssize_t col)
{
    for (Py_ssize_t f0 = 0; f0 < frames; f0 += FRAME_TILE) {
        Py_ssize_t nf = frames - f0 < FRAME_TILE ? frames - f0 : FRAME_TILE;
        for (Py_ssize_t r = 0; r < n_rows; r++) {
            const float *xa = x + f0 * channels + ia[r];
            const float *xb = x + f0 * channels + ib[r];
            float a = ca[r], c = cb[r];
            float *o = out + r * out_cols + col + f0;
            for (Py_ssize_t f = 0; f < nf; f++)
                o[f] = a * xa[f * channels] + c * xb[f * channels];
        }
    }
}

static int need(Py_buffer *buf, Py_ssize_t items, Py_ssize_t item_size, const char *name)
{
    if (buf->len < items * item_size) {
        PyErr_Format(PyExc_ValueError, "%s: buffer of %zd bytes, need %zd", name, buf->len, items * item_size);
        return 0;
    }
    return 1;
}

/* Release the buffers a call acquired (those never acquired have obj == NULL). */
static void release_all(Py_buffer *const *bufs, int n)
{
    for (int i = 0; i < n; i++)
        if (bufs[i]->obj != NULL)
            PyBuffer_Release(bufs[i]);
}

static PyObject *py_steer(PyObject *self, PyObject *args)
{
    (void)self;
    Py_buffer h_re, h_im = {0}, v, main_out, mirror_out, y;
    PyObject *h_im_obj;
    Py_ssize_t n_blocks, v_bins, k0, n_bins, n_rows, n_plain, n_beams, n_out;
    if (!PyArg_ParseTuple(args, "y*Oy*nnnnnnny*y*nw*", &h_re, &h_im_obj, &v, &n_blocks, &v_bins, &k0, &n_bins,
                          &n_rows, &n_plain, &n_beams, &main_out, &mirror_out, &n_out, &y))
        return NULL;
    int has_im = h_im_obj != Py_None;
    int ok = has_im ? PyObject_GetBuffer(h_im_obj, &h_im, PyBUF_SIMPLE) == 0 : 1;
    Py_ssize_t cells = n_bins * n_rows * ((n_beams + LANES - 1) / LANES * LANES);
    if (ok && !(n_blocks >= 0 && n_bins >= 0 && n_rows >= 0 && n_plain >= 0 && n_plain <= n_rows && n_beams >= 0
                && k0 >= 0 && k0 + n_bins <= v_bins)) {
        PyErr_SetString(PyExc_ValueError, "steer: bin or row range outside the spectra");
        ok = 0;
    }
    ok = ok && need(&h_re, cells, 4, "h_re") && (!has_im || need(&h_im, cells, 4, "h_im"))
         && need(&v, n_blocks * n_rows * v_bins, 8, "v") && need(&y, n_blocks * n_bins * n_out, 8, "y")
         && need(&main_out, n_beams, 4, "main_out") && need(&mirror_out, n_beams, 4, "mirror_out");
    const int *mo = (const int *)main_out.buf, *mm = (const int *)mirror_out.buf;
    for (Py_ssize_t b = 0; ok && b < n_beams; b++)
        if (mo[b] < 0 || mo[b] >= n_out || mm[b] < -1 || mm[b] >= n_out) {
            PyErr_SetString(PyExc_ValueError, "steer: output beam index outside the output");
            ok = 0;
        }
    if (ok) {
        Py_BEGIN_ALLOW_THREADS
        steer((const float *)h_re.buf, has_im ? (const float *)h_im.buf : NULL, (const float *)v.buf, n_blocks, v_bins,
              k0, n_bins, n_rows, n_plain, n_beams, mo, mm, n_out, (float *)y.buf);
        Py_END_ALLOW_THREADS
    }
    Py_buffer *const held[] = {&h_re, &h_im, &v, &main_out, &mirror_out, &y};
    release_all(held, 6);
    if (!ok)
        return NULL;
    Py_RETURN_NONE;
}

static PyObject *py_rows(PyObject *self, PyObject *args)
{
    (void)self;
    Py_buffer x, ia, ib, ca, cb, out;
    Py_ssize_t frames, channels, n_rows, out_cols, col;
    if (!PyArg_ParseTuple(args, "y*nny*y*y*y*nw*nn", &x, &frames, &channels, &ia, &ib, &ca, &cb, &n_rows, &out,
                          &out_cols, &col))
        return NULL;
    int ok = need(&x, frames * channels, 4, "x") && need(&ia, n_rows, 4, "ia") && need(&ib, n_rows, 4, "ib")
             && need(&ca, n_rows, 4, "ca") && need(&cb, n_rows, 4, "cb")
             && need(&out, (n_rows - 1) * out_cols + col + frames, 4, "out");
    if (ok && (col < 0 || col + frames > out_cols)) {
        PyErr_SetString(PyExc_ValueError, "rows: columns outside the history");
        ok = 0;
    }
    const int *a = (const int *)ia.buf, *b = (const int *)ib.buf;
    for (Py_ssize_t r = 0; ok && r < n_rows; r++)
        if (a[r] < 0 || a[r] >= channels || b[r] < 0 || b[r] >= channels) {
            PyErr_SetString(PyExc_ValueError, "rows: channel index outside the input");
            ok = 0;
        }
    if (ok) {
        Py_BEGIN_ALLOW_THREADS
        rows((const float *)x.buf, frames, channels, a, b, (const float *)ca.buf, (const float *)cb.buf, n_rows,
             (float *)out.buf, out_cols, col);
        Py_END_ALLOW_THREADS
    }
    Py_buffer *const held[] = {&x, &ia, &ib, &ca, &cb, &out};
    release_all(held, 6);
    if (!ok)
        return NULL;
    Py_RETURN_NONE;
}

static PyMethodDef methods[] = {
    {"steer", py_steer, METH_VARARGS,
     "steer(h_re, h_im, v, n_blocks, v_bins, k0, n_bins, n_rows, n_plain, n_beams, main_out, mirror_out, n_out, y): "
     "per-bin steered sums."},
    {"rows", py_rows, METH_VARARGS,
     "rows(x, frames, channels, ia, ib, ca, cb, n_rows, out, out_cols, col): history rows from input frames."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_kernels", "Compiled inner loops of the beamformer.",
                                    -1, methods};

PyMODINIT_FUNC PyInit__kernels(void)
{
    return PyModule_Create(&module);
}
