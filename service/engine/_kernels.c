/* The inner loops of the beamformer (and the power rows' text), compiled (see DEVELOPERS.md, "The compiled kernels").
 *
 * numpy and pocketfft do the same work in beamformer.py and transform.py;
 * these loops exist because there the per-bin products are thousands of tiny
 * matrix products (one BLAS call each, mostly call overhead), the history
 * write is a pass per operation, and the FFT is built for any machine. All
 * three work on the arrays in the layout the engine already has, so nothing
 * is transposed or copied on the way in or out.
 *
 * Only the CPython buffer protocol is used (no numpy headers): the Python side
 * passes C-contiguous float32 / complex64 / int32 arrays and their shapes, and
 * checks them before the call.
 *
 * The steered sums live in _steer_lanes.h, included twice below: eight beams
 * per register group for the power fans, four for short audio lists (so four
 * audio beams do not carry four beams of zero padding).
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <pthread.h>
#include <sched.h>
#include <stdatomic.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#if defined(__GNUC__) && defined(__x86_64__) && !defined(__clang__)
/* One clone for AVX2 with FMA, one for any x86-64; chosen once at load (glibc ifunc). */
#define CLONES __attribute__((target_clones("arch=x86-64-v3", "default")))
#else
#define CLONES
#endif

/* Most blocks accumulated at once (their accumulators stay in registers). */
#define MAX_BLOCKS 4

#define LANES 8
#define SV v8
#include "_steer_lanes.h"
#undef LANES
#define LANES 4
#define SV v4
#include "_steer_lanes.h"
#undef LANES

/* ---- Real FFT down the columns of a frame --------------------------------
 *
 * The frame is (n, columns) float32, a window of the history (frames down,
 * one column per history row), so FL neighbouring columns sit side by side in
 * memory: each vector lane carries one column through the whole transform,
 * and the loops below read like a scalar FFT over vectors. The real
 * transform of length n = 2M is a complex one of length M on z[m] = x[2m] +
 * j x[2m+1], split afterwards (the usual real FFT by a half-length complex
 * one). The complex transform is a self-sorting (Stockham) decimation in
 * frequency over radices 8, 4, 2, 3 and 5 (Van Loan 1992, Computational
 * Frameworks for the FFT; section numbers in transform.py are from memory).
 * Twiddles come precomputed from the caller. */
#define FL 8
typedef float vf __attribute__((vector_size(4 * FL)));
typedef float vfu __attribute__((vector_size(4 * FL), aligned(4))); /* the same, any alignment */
typedef int vi __attribute__((vector_size(4 * FL)));

static inline __attribute__((always_inline)) vf ld(const float *p) { return *(const vfu *)p; }
static inline __attribute__((always_inline)) void st(float *p, vf v) { *(vfu *)p = v; }

/* Lane shuffles: the compiler's own primitive where it has one (clang and GCC >= 12:
 * __builtin_shufflevector; older GCC: __builtin_shuffle), else plain C over the lanes, which
 * any compiler with vector extensions takes (and usually turns into the same instructions). */
#if defined(__has_builtin)
#if __has_builtin(__builtin_shufflevector)
#define HAVE_SHUFFLEVECTOR 1
#endif
#endif
#if defined(HAVE_SHUFFLEVECTOR)
#define REVERSE(v) __builtin_shufflevector((v), (v), 7, 6, 5, 4, 3, 2, 1, 0)
#define INTERLEAVE_LO(a, b) __builtin_shufflevector((a), (b), 0, 8, 1, 9, 2, 10, 3, 11)
#define INTERLEAVE_HI(a, b) __builtin_shufflevector((a), (b), 4, 12, 5, 13, 6, 14, 7, 15)
#elif defined(__GNUC__) && !defined(__clang__)
#define REVERSE(v) __builtin_shuffle((v), (vi){7, 6, 5, 4, 3, 2, 1, 0})
#define INTERLEAVE_LO(a, b) __builtin_shuffle((a), (b), (vi){0, 8, 1, 9, 2, 10, 3, 11})
#define INTERLEAVE_HI(a, b) __builtin_shuffle((a), (b), (vi){4, 12, 5, 13, 6, 14, 7, 15})
#else
static inline vf reverse_lanes(vf v) { vf r; for (int i = 0; i < FL; i++) r[i] = v[FL - 1 - i]; return r; }
static inline vf interleave(vf a, vf b, int half)
{
    vf r;
    for (int i = 0; i < FL / 2; i++) {
        r[2 * i] = a[half * FL / 2 + i];
        r[2 * i + 1] = b[half * FL / 2 + i];
    }
    return r;
}
#define REVERSE(v) reverse_lanes(v)
#define INTERLEAVE_LO(a, b) interleave((a), (b), 0)
#define INTERLEAVE_HI(a, b) interleave((a), (b), 1)
#endif

/* (ar + j ai)(wr + j wi), w a scalar twiddle */
#define CMUL_RE(ar, ai, wr, wi) ((ar) * (wr) - (ai) * (wi))
#define CMUL_IM(ar, ai, wr, wi) ((ar) * (wi) + (ai) * (wr))

/* ---- History rows from input frames --------------------------------------
 *
 * out[col + f, r] = ca[r] x[f, ia[r]] + cb[r] x[f, ib[r]]: history rows from
 * input frames x (frames, channels), float32; out is (out_frames, n_rows), one
 * history row per column, so both sides of a frame are contiguous. Channel
 * indices mostly run in steps of +1 or -1 for eight rows at a time (channels
 * in order, and the mirror partner of a line's sensor counting down), so such
 * a group is two vector loads, reversed where they run down, instead of
 * sixteen indexed loads. The same pass scans every input value (all
 * channels, used or not) for the smallest, the largest and any that is not
 * finite, so that clean blocks need no separate scan before the write. */
#define MAX_ROW_GROUPS 512

/* +1 when idx[0 .. FL-1] runs up by one, -1 when it runs down by one, 0 otherwise */
static int run_of(const int *idx)
{
    int up = 1, down = 1;
    for (int l = 1; l < FL; l++) {
        up &= idx[l] == idx[0] + l;
        down &= idx[l] == idx[0] - l;
    }
    return up ? 1 : down ? -1 : 0;
}

static inline __attribute__((always_inline)) void scalar_rows(float *o, const float *xf, const int *ia, const int *ib,
                                                               const float *ca, const float *cb, Py_ssize_t r0,
                                                               Py_ssize_t r1)
{
    for (Py_ssize_t r = r0; r < r1; r++)
        o[r] = ca[r] * xf[ia[r]] + cb[r] * xf[ib[r]];
}

static inline __attribute__((always_inline)) vf load_run(const float *xf, int first, int run)
{
    if (run > 0)
        return ld(xf + first);
    return REVERSE(ld(xf + first - (FL - 1)));
}

/* Rows [r_begin, r_end) of every frame (r_begin a multiple of FL), and the scan of input channels
 * [c_begin, c_end) (c_begin a multiple of FL). */
CLONES static void rows(const float *x, Py_ssize_t frames, Py_ssize_t channels, const int *ia, const int *ib,
                        const float *ca, const float *cb, Py_ssize_t n_rows, float *out, Py_ssize_t col,
                        float *lo_out, float *hi_out, int *finite_out, Py_ssize_t r_begin, Py_ssize_t r_end,
                        Py_ssize_t c_begin, Py_ssize_t c_end)
{
    /* Non-finite samples by their bits (exponent all ones: an infinity or a NaN), an integer
     * test that -ffast-math cannot fold away the way it may fold v - v or v != v. */
    const vi exp_mask = (vi){0} + 0x7f800000;
    vf lo = {0}, hi = {0};
    vi bad = {0};
    float lo_s = 0.0f, hi_s = 0.0f;
    int bad_s = 0;
    signed char run_a[MAX_ROW_GROUPS], run_b[MAX_ROW_GROUPS];
    Py_ssize_t g_begin = r_begin / FL, g_end = r_end / FL;
    if (g_end - g_begin > MAX_ROW_GROUPS)
        g_end = g_begin + MAX_ROW_GROUPS;
    Py_ssize_t groups = g_end - g_begin;
    /* run_a[g] != 0: group g is two vector loads (both index lists run); the signs give the directions */
    for (Py_ssize_t g = 0; g < groups; g++) {
        run_a[g] = (signed char)run_of(ia + (g_begin + g) * FL);
        run_b[g] = (signed char)run_of(ib + (g_begin + g) * FL);
        if (!run_b[g])
            run_a[g] = 0;
    }
    for (Py_ssize_t f = 0; f < frames; f++) {
        const float *xf = x + f * channels;
        float *o = out + (col + f) * n_rows;
        Py_ssize_t c = c_begin;
        for (; c + FL <= c_end; c += FL) {
            vf v = ld(xf + c);
            vi below = v < lo, above = v > hi;
            lo = (vf)(((vi)v & below) | ((vi)lo & ~below));
            hi = (vf)(((vi)v & above) | ((vi)hi & ~above));
            bad |= ((vi)v & exp_mask) == exp_mask;
        }
        for (; c < c_end; c++) {
            float v = xf[c];
            lo_s = v < lo_s ? v : lo_s;
            hi_s = v > hi_s ? v : hi_s;
            unsigned int u;
            memcpy(&u, &v, sizeof u);
            bad_s |= (u & 0x7f800000u) == 0x7f800000u;
        }
        for (Py_ssize_t g = 0, r = r_begin; g < groups; g++, r += FL) {
            if (run_a[g])
                st(o + r, ld(ca + r) * load_run(xf, ia[r], run_a[g]) + ld(cb + r) * load_run(xf, ib[r], run_b[g]));
            else
                scalar_rows(o, xf, ia, ib, ca, cb, r, r + FL);
        }
        scalar_rows(o, xf, ia, ib, ca, cb, g_end * FL, r_end);
    }
    for (int l = 0; l < FL; l++) {
        lo_s = lo[l] < lo_s ? lo[l] : lo_s;
        hi_s = hi[l] > hi_s ? hi[l] : hi_s;
        bad_s |= bad[l] != 0;
    }
    *lo_out = lo_s, *hi_out = hi_s;
    *finite_out = !bad_s;
}

/* One stage: length L = p * m, stride s (in vectors). Reads x, writes y planes.
 * y[t + s (p q + k)] = W_L^{q k} * sum_r x[t + s (q + r m)] w_p^{r k}.
 * Input element i is at xr + i * in_step (real part) and xi + i * in_step:
 * in_step is FL for planes, and for the first stage twice the frame's row
 * stride, so that it reads z[i] = x[2i] + j x[2i+1] straight from the frame
 * (no packing pass). */
static inline __attribute__((always_inline)) void stage(const float *xr, const float *xi, Py_ssize_t in_step,
                                                         float *yr, float *yi, Py_ssize_t m, Py_ssize_t s, int p,
                                                         const float *tw)
{
    for (Py_ssize_t q = 0; q < m; q++) {
        const float *w = tw + 2 * (p - 1) * q;
        for (Py_ssize_t t = 0; t < s; t++) {
#define X(r) (in_step * (t + s * (q + (r) * m)))
#define Y(k) (FL * (t + s * (p * q + (k))))
#define OUT(k, br, bi)                                                             \
    do {                                                                           \
        if ((k) == 0) {                                                            \
            st(yr + Y(0), br);                                                     \
            st(yi + Y(0), bi);                                                     \
        } else {                                                                   \
            float wr_ = w[2 * ((k) - 1)], wi_ = w[2 * ((k) - 1) + 1];              \
            st(yr + Y(k), CMUL_RE(br, bi, wr_, wi_));                              \
            st(yi + Y(k), CMUL_IM(br, bi, wr_, wi_));                              \
        }                                                                          \
    } while (0)
/* radix-4 butterfly of a0 .. a3 (t3 = (a1 - a3) * (-j)), outputs k0 .. k3 */
#define DFT4(a0r, a0i, a1r, a1i, a2r, a2i, a3r, a3i, k0, k1, k2, k3)                    \
    do {                                                                               \
        vf t0r = a0r + a2r, t0i = a0i + a2i, t1r = a0r - a2r, t1i = a0i - a2i;          \
        vf t2r = a1r + a3r, t2i = a1i + a3i, t3r = a1i - a3i, t3i = a3r - a1r;          \
        OUT(k0, t0r + t2r, t0i + t2i);                                                 \
        OUT(k1, t1r + t3r, t1i + t3i);                                                 \
        OUT(k2, t0r - t2r, t0i - t2i);                                                 \
        OUT(k3, t1r - t3r, t1i - t3i);                                                 \
    } while (0)
            if (p == 8) {
                /* radix 2 across r, r + 4 (the difference turned by w_8^r), then radix 4 on each half */
                const float h = 0.70710678118654752440f;
                vf b0r = ld(xr + X(0)) + ld(xr + X(4)), b0i = ld(xi + X(0)) + ld(xi + X(4));
                vf c0r = ld(xr + X(0)) - ld(xr + X(4)), c0i = ld(xi + X(0)) - ld(xi + X(4));
                vf b1r = ld(xr + X(1)) + ld(xr + X(5)), b1i = ld(xi + X(1)) + ld(xi + X(5));
                vf d1r = ld(xr + X(1)) - ld(xr + X(5)), d1i = ld(xi + X(1)) - ld(xi + X(5));
                vf b2r = ld(xr + X(2)) + ld(xr + X(6)), b2i = ld(xi + X(2)) + ld(xi + X(6));
                vf c2r = ld(xi + X(2)) - ld(xi + X(6)), c2i = ld(xr + X(6)) - ld(xr + X(2)); /* * -j */
                vf b3r = ld(xr + X(3)) + ld(xr + X(7)), b3i = ld(xi + X(3)) + ld(xi + X(7));
                vf d3r = ld(xr + X(3)) - ld(xr + X(7)), d3i = ld(xi + X(3)) - ld(xi + X(7));
                vf c1r = h * (d1r + d1i), c1i = h * (d1i - d1r); /* * (1 - j) / sqrt 2 */
                vf c3r = h * (d3i - d3r), c3i = -h * (d3r + d3i); /* * (-1 - j) / sqrt 2 */
                DFT4(b0r, b0i, b1r, b1i, b2r, b2i, b3r, b3i, 0, 2, 4, 6);
                DFT4(c0r, c0i, c1r, c1i, c2r, c2i, c3r, c3i, 1, 3, 5, 7);
            } else if (p == 4) {
                vf a0r = ld(xr + X(0)), a0i = ld(xi + X(0)), a1r = ld(xr + X(1)), a1i = ld(xi + X(1));
                vf a2r = ld(xr + X(2)), a2i = ld(xi + X(2)), a3r = ld(xr + X(3)), a3i = ld(xi + X(3));
                DFT4(a0r, a0i, a1r, a1i, a2r, a2i, a3r, a3i, 0, 1, 2, 3);
            } else if (p == 2) {
                vf a0r = ld(xr + X(0)), a0i = ld(xi + X(0)), a1r = ld(xr + X(1)), a1i = ld(xi + X(1));
                OUT(0, a0r + a1r, a0i + a1i);
                OUT(1, a0r - a1r, a0i - a1i);
            } else if (p == 3) {
                const float c = -0.5f, sn = 0.86602540378443864676f;
                vf a0r = ld(xr + X(0)), a0i = ld(xi + X(0)), a1r = ld(xr + X(1)), a1i = ld(xi + X(1));
                vf a2r = ld(xr + X(2)), a2i = ld(xi + X(2));
                vf tr = a1r + a2r, ti = a1i + a2i, dr = a1r - a2r, di = a1i - a2i;
                vf mr = a0r + c * tr, mi = a0i + c * ti;
                /* -j sn (a1 - a2) */
                vf nr = sn * di, ni = -sn * dr;
                OUT(0, a0r + tr, a0i + ti);
                OUT(1, mr + nr, mi + ni);
                OUT(2, mr - nr, mi - ni);
            } else { /* p == 5 */
                const float c1 = 0.30901699437494742410f, c2 = -0.80901699437494742410f;
                const float s1 = 0.95105651629515357212f, s2 = 0.58778525229247312917f;
                vf a0r = ld(xr + X(0)), a0i = ld(xi + X(0)), a1r = ld(xr + X(1)), a1i = ld(xi + X(1));
                vf a2r = ld(xr + X(2)), a2i = ld(xi + X(2)), a3r = ld(xr + X(3)), a3i = ld(xi + X(3));
                vf a4r = ld(xr + X(4)), a4i = ld(xi + X(4));
                vf t1r = a1r + a4r, t1i = a1i + a4i, t2r = a2r + a3r, t2i = a2i + a3i;
                vf t3r = a1r - a4r, t3i = a1i - a4i, t4r = a2r - a3r, t4i = a2i - a3i;
                vf m1r = a0r + c1 * t1r + c2 * t2r, m1i = a0i + c1 * t1i + c2 * t2i;
                vf m2r = a0r + c2 * t1r + c1 * t2r, m2i = a0i + c2 * t1i + c1 * t2i;
                /* n1 = -j (s1 t3 + s2 t4), n2 = -j (s2 t3 - s1 t4) */
                vf u1r = s1 * t3r + s2 * t4r, u1i = s1 * t3i + s2 * t4i;
                vf u2r = s2 * t3r - s1 * t4r, u2i = s2 * t3i - s1 * t4i;
                OUT(0, a0r + t1r + t2r, a0i + t1i + t2i);
                OUT(1, m1r + u1i, m1i - u1r);
                OUT(4, m1r - u1i, m1i + u1r);
                OUT(2, m2r + u2i, m2i - u2r);
                OUT(3, m2r - u2i, m2i + u2r);
            }
#undef X
#undef Y
#undef OUT
#undef DFT4
        }
    }
}

/* out[k, col] = sum_f x[f, col] exp(-2 pi j k f / n), k = 0 .. n/2, for columns
 * [0, n_cols); x rows are x_stride floats apart. factors: the radices of M = n/2
 * in stage order; tw: complex64 twiddles, each stage's (m, p - 1) table W_L^{qk}
 * (L the stage length, q < m = L/p, k = 1 .. p-1) in stage order, then
 * exp(-2 pi j k / n) for k = 0 .. M; scratch: 4 M FL floats. */
/* Columns [c_begin, c_end) of n_cols (c_begin a multiple of FL): a team's share of the frame. */
CLONES static void rfft_columns(const float *x, Py_ssize_t x_stride, Py_ssize_t n_cols, Py_ssize_t n,
                                const int *factors, int n_factors, const float *tw, float *scratch, float *out,
                                Py_ssize_t c_begin, Py_ssize_t c_end)
{
    Py_ssize_t M = n / 2;
    float *pr = scratch, *pi = scratch + M * FL, *qr = scratch + 2 * M * FL, *qi = scratch + 3 * M * FL;
    for (Py_ssize_t c0 = c_begin; c0 < c_end; c0 += FL) {
        Py_ssize_t nc = n_cols - c0 < FL ? n_cols - c0 : FL;
        /* the complex transform of z[m] = x[2m] + j x[2m+1], ping-ponging between the p and q
         * planes; a whole group of columns is read by the first stage straight from the frame */
        const float *ar = x + c0, *ai = x + x_stride + c0;
        Py_ssize_t step = 2 * x_stride;
        if (nc < FL) {
            for (Py_ssize_t m = 0; m < M; m++) {
                const float *e = x + (2 * m) * x_stride + c0, *o = e + x_stride;
                for (Py_ssize_t l = 0; l < FL; l++) {
                    qr[m * FL + l] = l < nc ? e[l] : 0.0f;
                    qi[m * FL + l] = l < nc ? o[l] : 0.0f;
                }
            }
            ar = qr, ai = qi, step = FL;
        }
        float *br = pr, *bi = pi;
        const float *w = tw;
        Py_ssize_t L = M, s = 1;
        for (int f = 0; f < n_factors; f++) {
            int p = factors[f];
            Py_ssize_t m = L / p;
            switch (p) {
            case 8: stage(ar, ai, step, br, bi, m, s, 8, w); break;
            case 4: stage(ar, ai, step, br, bi, m, s, 4, w); break;
            case 2: stage(ar, ai, step, br, bi, m, s, 2, w); break;
            case 3: stage(ar, ai, step, br, bi, m, s, 3, w); break;
            default: stage(ar, ai, step, br, bi, m, s, 5, w); break;
            }
            w += 2 * (p - 1) * m;
            L = m;
            s *= p;
            ar = br, ai = bi, step = FL;
            br = br == pr ? qr : pr, bi = bi == pi ? qi : pi;
        }
        /* split: X[k] = (Z[k] + conj Z[M-k]) / 2 - j W^k (Z[k] - conj Z[M-k]) / 2 */
        for (Py_ssize_t k = 0; k <= M; k++) {
            Py_ssize_t k1 = k == M ? 0 : k, k2 = k == 0 ? 0 : M - k;
            vf zr = ld(ar + k1 * FL), zi = ld(ai + k1 * FL), cr = ld(ar + k2 * FL), ci = -ld(ai + k2 * FL);
            vf er = 0.5f * (zr + cr), ei = 0.5f * (zi + ci);
            vf dr = 0.5f * (zr - cr), di = 0.5f * (zi - ci);
            /* o = -j d */
            vf orr = di, oi = -dr;
            float wr = w[2 * k], wi = w[2 * k + 1]; /* past the stages' tables: the split's W_n^k */
            vf xr_ = er + CMUL_RE(orr, oi, wr, wi), xi_ = ei + CMUL_IM(orr, oi, wr, wi);
            float *o = out + 2 * (k * n_cols + c0);
            if (nc == FL) {
                vf lo = INTERLEAVE_LO(xr_, xi_);
                vf hi = INTERLEAVE_HI(xr_, xi_);
                st(o, lo);
                st(o + FL, hi);
            } else {
                for (Py_ssize_t l = 0; l < nc; l++) {
                    o[2 * l] = xr_[l];
                    o[2 * l + 1] = xi_[l];
                }
            }
        }
    }
}

/* ---- Band power: a quadratic form per steered spectrum ---------------------
 *
 * out[q] = sum_c (sum_i v_q[i] f[i, c])^2 for the rows q in [q0, q1): v_q
 * the interleaved (re, im) floats of one beam's band bins (width floats,
 * row_stride floats from one row to the next), f (width, f_cols) the band's
 * factor with its columns padded by zeros to a multiple of 2 FL (see
 * bandpower.BandPowerEvaluator). Four rows share every load of f; two
 * vectors of columns at a time keep the eight accumulators in registers. */
#define QF_ROWS 4

CLONES static void quadform(const float *y, Py_ssize_t row_stride, Py_ssize_t q0, Py_ssize_t q1, Py_ssize_t width,
                            const float *f, Py_ssize_t f_cols, float *out)
{
    for (Py_ssize_t q = q0; q < q1; q += QF_ROWS) {
        int nq = q1 - q < QF_ROWS ? (int)(q1 - q) : QF_ROWS;
        const float *v[QF_ROWS];
        for (int b = 0; b < QF_ROWS; b++) /* rows past the end repeat the last one; their sums are dropped */
            v[b] = y + (q + (b < nq ? b : nq - 1)) * row_stride;
        float total[QF_ROWS] = {0};
        for (Py_ssize_t c0 = 0; c0 < f_cols; c0 += 2 * FL) {
            vf a0[QF_ROWS] = {{0}}, a1[QF_ROWS] = {{0}};
            for (Py_ssize_t i = 0; i < width; i++) {
                vf f0 = ld(f + i * f_cols + c0), f1 = ld(f + i * f_cols + c0 + FL);
                for (int b = 0; b < QF_ROWS; b++) {
                    a0[b] += v[b][i] * f0;
                    a1[b] += v[b][i] * f1;
                }
            }
            for (int b = 0; b < QF_ROWS; b++) {
                vf s = a0[b] * a0[b] + a1[b] * a1[b];
                for (int l = 0; l < FL; l++)
                    total[b] += s[l];
            }
        }
        for (int b = 0; b < nq; b++)
            out[q + b] = total[b];
    }
}

/* ---- A team of threads for one call ---------------------------------------
 *
 * A kernel call can be split into parts that run at once, with the GIL
 * released throughout. Each part writes its own outputs (bins of the steered
 * sums, column groups of the FFT, frames of the history, rows of the band
 * power), so the result is the same bit for bit whatever thread runs which
 * part. The parts of a call are claimed from one counter: the caller and any
 * helper that is awake take the next unclaimed part until none is left, so a
 * helper that is asleep or descheduled delays nothing (the caller does its
 * parts). Helpers wait for the next call by spinning for a short while, so that
 * the several calls of one block hand over in well under a microsecond: a
 * thread put to sleep and woken through the kernel costs tens of microseconds
 * on a virtual machine (about 50 µs measured here, 2026-12-05, for a
 * ping-pong between two Python threads), a tenth of a 64-sensor block. After
 * SPIN_NS without work they sleep on a condition variable; team_wake rouses
 * them ahead of a block. */
#define TEAM_MAX 64
#define SPIN_NS 300000LL /* the default: 0.3 ms */
#define PART_BITS 16 /* the ticket: call number above, next unclaimed part below */
#define PART_MASK ((1ULL << PART_BITS) - 1)

typedef void (*part_fn)(void *job, int part, int parts);

typedef struct Team Team;
struct Team {
    PyObject_HEAD
    int parts, started;
    long long spin_ns; /* how long an idle helper spins before it sleeps */
    long pid; /* a forked child has no helpers: it runs every part itself */
    pthread_t threads[TEAM_MAX];
    pthread_mutex_t lock, call_lock;
    pthread_cond_t wake;
    atomic_ullong ticket; /* (call << PART_BITS) | next part to claim */
    atomic_int done;      /* parts of the current call finished */
    atomic_int call_parts; /* parts of the current call (written before its ticket) */
    unsigned long long call;
    unsigned long alert; /* bumped by team_wake (under lock): sleepers wake and spin again */
    int stop;
    part_fn fn;
    void *job;
    /* A call started by team_start and not yet ended: call_lock stays held by its owner, the
     * thread that started it, until team_end (its join, or its next call on this team). */
    atomic_int open;
    unsigned long long open_call;
    pthread_t open_owner;
};

static inline void relax(void)
{
#if defined(__x86_64__) || defined(__i386__)
    __builtin_ia32_pause();
#elif defined(__aarch64__)
    __asm__ __volatile__("yield");
#endif
}

static long long now_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return ts.tv_sec * 1000000000LL + ts.tv_nsec;
}

/* Claim and run parts of the current call until none is left. A successful claim pins the call:
 * it cannot finish (nor fn and job change) before the claimed part is done. */
static unsigned long long team_work(Team *t)
{
    /* Returns the exhausted ticket it saw last. A claim is a compare-and-swap of the whole ticket,
     * call number included, so a stale ticket never claims a part of a later call. */
    unsigned long long s = atomic_load_explicit(&t->ticket, memory_order_acquire);
    while ((s & PART_MASK) < (unsigned long long)t->call_parts) {
        if (atomic_compare_exchange_weak_explicit(&t->ticket, &s, s + 1, memory_order_acq_rel,
                                                  memory_order_acquire)) {
            t->fn(t->job, (int)(s & PART_MASK), t->call_parts);
            atomic_fetch_add_explicit(&t->done, 1, memory_order_release);
            s = atomic_load_explicit(&t->ticket, memory_order_acquire);
        }
    }
    return s;
}

static void *helper_main(void *arg)
{
    Team *t = arg;
    unsigned long long seen = 0;
    for (;;) {
        unsigned long long s = atomic_load_explicit(&t->ticket, memory_order_acquire);
        if (s == seen) {
            long long deadline = now_ns() + t->spin_ns;
            for (int n = 1; (s = atomic_load_explicit(&t->ticket, memory_order_acquire)) == seen; n++) {
                relax();
                /* Now and then let other runnable threads of this machine have the core: an idle
                 * helper that never yields takes a whole core from whoever else needs it (measured
                 * here with 20 subscribers beside the service: block p99 0.8 -> 1.5 ms). */
                if ((n & 63) == 0)
                    sched_yield();
                if ((n & 255) == 0 && now_ns() > deadline) {
                    pthread_mutex_lock(&t->lock);
                    unsigned long alert = t->alert;
                    while ((s = atomic_load_explicit(&t->ticket, memory_order_acquire)) == seen && t->alert == alert
                           && !t->stop)
                        pthread_cond_wait(&t->wake, &t->lock);
                    pthread_mutex_unlock(&t->lock);
                    deadline = now_ns() + t->spin_ns; /* woken by work or an alert: spin again */
                }
            }
        }
        pthread_mutex_lock(&t->lock);
        int stop = t->stop;
        pthread_mutex_unlock(&t->lock);
        if (stop)
            return NULL;
        /* wait for the next call: a ticket other than this call's exhausted one */
        seen = team_work(t);
    }
}

static int team_usable(const Team *t) { return t != NULL && t->started && t->pid == (long)getpid(); }

static void run_inline(part_fn fn, void *job, int parts)
{
    for (int p = 0; p < parts; p++)
        fn(job, p, parts);
}

/* Finish the open call on this thread: claim what is left, wait for the rest, release the team. */
static void team_end(Team *t)
{
    team_work(t);
    while (atomic_load_explicit(&t->done, memory_order_acquire) < t->call_parts)
        relax();
    t->open = 0;
    pthread_mutex_unlock(&t->call_lock);
}

/* Hand the parts of fn(job) to the team; the caller holds call_lock after it. */
static void team_begin(Team *t, part_fn fn, void *job, int parts)
{
    if (t->open && pthread_equal(t->open_owner, pthread_self()))
        team_end(t); /* this thread's started call ends before the next begins */
    pthread_mutex_lock(&t->call_lock); /* one call at a time */
    t->fn = fn, t->job = job, t->call_parts = parts;
    atomic_store_explicit(&t->done, 0, memory_order_relaxed);
    t->call++;
    pthread_mutex_lock(&t->lock);
    atomic_store_explicit(&t->ticket, t->call << PART_BITS, memory_order_release);
    pthread_cond_broadcast(&t->wake);
    pthread_mutex_unlock(&t->lock);
}

/* fn(job, part, parts) for every part of `parts`; called without the GIL. */
static void team_run_parts(Team *t, part_fn fn, void *job, int parts)
{
    if (!team_usable(t)) {
        run_inline(fn, job, parts);
        return;
    }
    team_begin(t, fn, job, parts);
    team_end(t);
}

/* One part per thread: for loops whose parts keep per-thread state (scratch, partial results). */
static void team_run(Team *t, part_fn fn, void *job)
{
    team_run_parts(t, fn, job, t == NULL ? 1 : t->parts);
}

/* Parts for loops without per-thread state: several per thread, claimed as threads come free,
 * so a thread that arrives late (busy with other work, or descheduled) finds work left. */
static int fine_parts(const Team *t) { return t == NULL ? 1 : 4 * t->parts; }

/* Start fn(job) on the helpers and return at once, so the caller can do other work (outside
 * this team) meanwhile; team_join finishes it. Returns the call's number, or 0 when it ran
 * here to the end (no helpers). Called without the GIL. */
static unsigned long long team_start(Team *t, part_fn fn, void *job, int parts)
{
    if (!team_usable(t)) {
        run_inline(fn, job, parts);
        return 0;
    }
    team_begin(t, fn, job, parts);
    t->open_call = t->call, t->open_owner = pthread_self();
    t->open = 1;
    return t->call;
}

/* Wait until started call `call` is done, working on its parts meanwhile. Its owner also
 * releases the team; another thread leaves that to the owner's next call. */
static void team_join(Team *t, unsigned long long call)
{
    if (call == 0 || !t->open || t->open_call != call)
        return; /* ran inline, or ended by a later call of its owner */
    if (pthread_equal(t->open_owner, pthread_self())) {
        team_end(t);
        return;
    }
    team_work(t);
    while (atomic_load_explicit(&t->done, memory_order_acquire) < t->call_parts)
        relax();
}

static PyObject *team_new(PyTypeObject *type, PyObject *args, PyObject *kwds)
{
    Py_ssize_t parts;
    double spin_s = SPIN_NS * 1e-9;
    static char *names[] = {"threads", "spin_s", NULL};
    if (!PyArg_ParseTupleAndKeywords(args, kwds, "n|d", names, &parts, &spin_s))
        return NULL;
    if (parts < 1 || parts > TEAM_MAX) {
        PyErr_Format(PyExc_ValueError, "threads=%zd: expected 1 to %d", parts, TEAM_MAX);
        return NULL;
    }
    if (!(spin_s >= 0.0 && spin_s <= 10.0)) {
        PyErr_Format(PyExc_ValueError, "spin_s=%g: expected 0 to 10 seconds", spin_s);
        return NULL;
    }
    Team *t = (Team *)type->tp_alloc(type, 0);
    if (t == NULL)
        return NULL;
    t->parts = (int)parts, t->pid = (long)getpid(), t->spin_ns = (long long)(spin_s * 1e9);
    pthread_mutex_init(&t->lock, NULL);
    pthread_mutex_init(&t->call_lock, NULL);
    pthread_cond_init(&t->wake, NULL);
    /* no call yet: nothing to claim */
    atomic_init(&t->ticket, (unsigned long long)t->parts);
    atomic_init(&t->done, 0);
    for (int i = 1; i < t->parts; i++) {
        if (pthread_create(&t->threads[i], NULL, helper_main, t) != 0)
            break;
        t->started++;
    }
    if (t->started != t->parts - 1) { /* the dealloc stops the ones that did start */
        Py_DECREF(t);
        PyErr_SetString(PyExc_OSError, "Team: could not start the helper threads");
        return NULL;
    }
    return (PyObject *)t;
}

/* Stop and join the helpers; later calls run every part on the caller's thread. */
static void team_stop(Team *t)
{
    if (t->pid == (long)getpid() && t->started) {
        if (t->open && pthread_equal(t->open_owner, pthread_self()))
            team_end(t);
        pthread_mutex_lock(&t->call_lock);
        pthread_mutex_lock(&t->lock);
        t->stop = 1;
        t->call++;
        t->call_parts = 0; /* the stop ticket has no parts to claim */
        atomic_store_explicit(&t->ticket, (t->call << PART_BITS) | (unsigned long long)t->parts,
                              memory_order_release);
        pthread_cond_broadcast(&t->wake);
        pthread_mutex_unlock(&t->lock);
        for (int i = 1; i <= t->started; i++)
            pthread_join(t->threads[i], NULL);
        t->started = 0;
        pthread_mutex_unlock(&t->call_lock);
    }
}

static void team_dealloc(Team *t)
{
    team_stop(t);
    pthread_mutex_destroy(&t->lock);
    pthread_mutex_destroy(&t->call_lock);
    pthread_cond_destroy(&t->wake);
    Py_TYPE(t)->tp_free((PyObject *)t);
}

static PyObject *team_wake(Team *t, PyObject *unused)
{
    (void)unused;
    /* sleeping helpers wake and spin, ready for the calls of the next block */
    if (t->started && t->pid == (long)getpid()) {
        pthread_mutex_lock(&t->lock);
        t->alert++;
        pthread_cond_broadcast(&t->wake);
        pthread_mutex_unlock(&t->lock);
    }
    Py_RETURN_NONE;
}

static PyObject *team_close(Team *t, PyObject *unused)
{
    (void)unused;
    Py_BEGIN_ALLOW_THREADS
    team_stop(t);
    Py_END_ALLOW_THREADS
    Py_RETURN_NONE;
}

static PyObject *team_threads(Team *t, void *closure)
{
    (void)closure;
    return PyLong_FromLong(t->started + 1);
}

static PyMethodDef team_methods[] = {
    {"wake", (PyCFunction)team_wake, METH_NOARGS, "wake(): rouse sleeping helpers ahead of the next calls."},
    {"close", (PyCFunction)team_close, METH_NOARGS,
     "close(): stop the helper threads; later calls run every part on the caller's thread."},
    {NULL, NULL, 0, NULL},
};

static PyGetSetDef team_getset[] = {
    {"threads", (getter)team_threads, NULL, "threads working on a call, the caller's included", NULL},
    {NULL, NULL, NULL, NULL, NULL},
};

static PyTypeObject TeamType = {
    PyVarObject_HEAD_INIT(NULL, 0).tp_name = "beamtap.service.engine._kernels.Team",
    .tp_basicsize = sizeof(Team),
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "Team(threads, spin_s=0.0003): helper threads that run the parts of a kernel call at once; an idle "
              "helper spins spin_s seconds before it sleeps.",
    .tp_new = team_new,
    .tp_dealloc = (destructor)team_dealloc,
    .tp_methods = team_methods,
    .tp_getset = team_getset,
};

/* The team argument of a kernel: None or a Team. */
static int as_team(PyObject *obj, Team **out)
{
    if (obj == NULL || obj == Py_None) {
        *out = NULL;
        return 1;
    }
    if (!PyObject_TypeCheck(obj, &TeamType)) {
        PyErr_Format(PyExc_TypeError, "team: expected a Team or None, got %s", Py_TYPE(obj)->tp_name);
        return 0;
    }
    *out = (Team *)obj;
    return 1;
}

static inline Py_ssize_t part_start(Py_ssize_t n, int part, int parts) { return n * part / parts; }

/* ---- Python bindings ------------------------------------------------------ */

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

struct steer_job {
    const float *h_re, *h_im, *v;
    Py_ssize_t n_blocks, v_bins, k0, n_bins, n_rows, n_plain, n_beams, n_out, lanes;
    const int *main_out, *mirror_out;
    float *y;
};

static void steer_part(void *arg, int part, int parts)
{
    const struct steer_job *j = arg;
    (j->lanes == 4 ? steer4 : steer8)(j->h_re, j->h_im, j->v, j->n_blocks, j->v_bins, j->k0, j->n_bins, j->n_rows,
                                      j->n_plain, j->n_beams, j->main_out, j->mirror_out, j->n_out, j->y,
                                      part_start(j->n_bins, part, parts), part_start(j->n_bins, part + 1, parts));
}

/* One steer call's job and the buffers it holds until the sums are done. */
struct steer_call {
    struct steer_job job;
    Py_buffer h_re, h_im, v, main_out, mirror_out, y;
    Team *team; /* borrowed from the arguments; a started call keeps its own reference */
};

static void steer_release(struct steer_call *c)
{
    Py_buffer *const held[] = {&c->h_re, &c->h_im, &c->v, &c->main_out, &c->mirror_out, &c->y};
    release_all(held, 6);
}

/* Parse and check steer's arguments into `c` (zeroed by the caller). On error: exception set,
 * buffers released, 0 returned. */
static int steer_prepare(PyObject *args, struct steer_call *c)
{
    PyObject *h_im_obj, *team_obj = NULL;
    Py_ssize_t n_blocks, v_bins, k0, n_bins, n_rows, n_plain, n_beams, n_out, lanes;
    if (!PyArg_ParseTuple(args, "y*Oy*nnnnnnny*y*nw*n|O", &c->h_re, &h_im_obj, &c->v, &n_blocks, &v_bins, &k0,
                          &n_bins, &n_rows, &n_plain, &n_beams, &c->main_out, &c->mirror_out, &n_out, &c->y, &lanes,
                          &team_obj))
        return 0;
    int has_im = h_im_obj != Py_None;
    int ok = as_team(team_obj, &c->team) && (has_im ? PyObject_GetBuffer(h_im_obj, &c->h_im, PyBUF_SIMPLE) == 0 : 1);
    if (ok && lanes != 4 && lanes != 8) {
        PyErr_SetString(PyExc_ValueError, "steer: lanes must be 4 or 8");
        ok = 0;
    }
    Py_ssize_t cells = ok ? n_bins * n_rows * ((n_beams + lanes - 1) / lanes * lanes) : 0;
    if (ok && !(n_blocks >= 0 && n_bins >= 0 && n_rows >= 0 && n_plain >= 0 && n_plain <= n_rows && n_beams >= 0
                && k0 >= 0 && k0 + n_bins <= v_bins)) {
        PyErr_SetString(PyExc_ValueError, "steer: bin or row range outside the spectra");
        ok = 0;
    }
    ok = ok && need(&c->h_re, cells, 4, "h_re") && (!has_im || need(&c->h_im, cells, 4, "h_im"))
         && need(&c->v, n_blocks * n_rows * v_bins, 8, "v") && need(&c->y, n_blocks * n_bins * n_out, 8, "y")
         && need(&c->main_out, n_beams, 4, "main_out") && need(&c->mirror_out, n_beams, 4, "mirror_out");
    const int *mo = (const int *)c->main_out.buf, *mm = (const int *)c->mirror_out.buf;
    for (Py_ssize_t b = 0; ok && b < n_beams; b++)
        if (mo[b] < 0 || mo[b] >= n_out || mm[b] < -1 || mm[b] >= n_out) {
            PyErr_SetString(PyExc_ValueError, "steer: output beam index outside the output");
            ok = 0;
        }
    if (!ok) {
        steer_release(c);
        return 0;
    }
    c->job = (struct steer_job){(const float *)c->h_re.buf, has_im ? (const float *)c->h_im.buf : NULL,
                                (const float *)c->v.buf, n_blocks, v_bins, k0, n_bins, n_rows, n_plain, n_beams,
                                n_out, lanes, mo, mm, (float *)c->y.buf};
    return 1;
}

static PyObject *py_steer(PyObject *self, PyObject *args)
{
    (void)self;
    struct steer_call c;
    memset(&c, 0, sizeof c);
    if (!steer_prepare(args, &c))
        return NULL;
    Py_BEGIN_ALLOW_THREADS
    team_run_parts(c.team, steer_part, &c.job, fine_parts(c.team));
    Py_END_ALLOW_THREADS
    steer_release(&c);
    Py_RETURN_NONE;
}

/* A steer call running on the team's helpers: join() waits for it and frees its buffers. */
typedef struct {
    PyObject_HEAD
    struct steer_call c;
    unsigned long long call; /* the team's call number; 0: done (ran inline, or joined) */
} Started;

static void started_finish(Started *s)
{
    if (s->call) {
        Py_BEGIN_ALLOW_THREADS
        team_join(s->c.team, s->call);
        Py_END_ALLOW_THREADS
        s->call = 0;
    }
    steer_release(&s->c);
    Py_CLEAR(s->c.team);
}

static PyObject *started_join(Started *s, PyObject *unused)
{
    (void)unused;
    started_finish(s);
    Py_RETURN_NONE;
}

static void started_dealloc(Started *s)
{
    started_finish(s); /* never free buffers the helpers may still write */
    Py_TYPE(s)->tp_free((PyObject *)s);
}

static PyMethodDef started_methods[] = {
    {"join", (PyCFunction)started_join, METH_NOARGS,
     "join(): wait until the call is done (working on its parts meanwhile); its output is then ready."},
    {NULL, NULL, 0, NULL},
};

static PyTypeObject StartedType = {
    PyVarObject_HEAD_INIT(NULL, 0).tp_name = "beamtap.service.engine._kernels.Started",
    .tp_basicsize = sizeof(Started),
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "A kernel call started on a team's helpers (steer_start); join() before reading its output.",
    .tp_dealloc = (destructor)started_dealloc,
    .tp_methods = started_methods,
};

static PyObject *py_steer_start(PyObject *self, PyObject *args)
{
    (void)self;
    Started *s = PyObject_New(Started, &StartedType);
    if (s == NULL)
        return NULL;
    memset(&s->c, 0, sizeof s->c);
    s->call = 0;
    if (!steer_prepare(args, &s->c)) {
        s->c.team = NULL; /* borrowed until here */
        Py_DECREF(s);
        return NULL;
    }
    Py_XINCREF(s->c.team);
    unsigned long long call;
    Py_BEGIN_ALLOW_THREADS
    call = team_start(s->c.team, steer_part, &s->c.job, fine_parts(s->c.team));
    Py_END_ALLOW_THREADS
    s->call = call;
    return (PyObject *)s;
}

struct rows_job {
    const float *x;
    Py_ssize_t frames, channels, n_rows, col;
    const int *ia, *ib;
    const float *ca, *cb;
    float *out;
    float lo[TEAM_MAX], hi[TEAM_MAX];
    int finite[TEAM_MAX];
};

/* [begin, end) of part `part` of n items in whole groups of FL (the last group may be short). */
static void fl_share(Py_ssize_t n, int part, int parts, Py_ssize_t *begin, Py_ssize_t *end)
{
    Py_ssize_t groups = (n + FL - 1) / FL;
    *begin = FL * part_start(groups, part, parts);
    *end = FL * part_start(groups, part + 1, parts);
    *begin = *begin < n ? *begin : n;
    *end = *end < n ? *end : n;
}

static void rows_part(void *arg, int part, int parts)
{
    struct rows_job *j = arg;
    /* Frames, not rows, in shares: a frame's rows share cache lines (16 rows to a line), and
     * two threads writing one line make it bounce between their cores (measured here,
     * 2026-12-05: the 16-sensor write three times slower split by rows than by frames). */
    Py_ssize_t f0 = part_start(j->frames, part, parts), f1 = part_start(j->frames, part + 1, parts);
    j->lo[part] = j->hi[part] = 0.0f, j->finite[part] = 1;
    rows(j->x + f0 * j->channels, f1 - f0, j->channels, j->ia, j->ib, j->ca, j->cb, j->n_rows, j->out, j->col + f0,
         &j->lo[part], &j->hi[part], &j->finite[part], 0, j->n_rows, 0, j->channels);
}

static PyObject *py_rows(PyObject *self, PyObject *args)
{
    (void)self;
    Py_buffer x, ia, ib, ca, cb, out;
    PyObject *team_obj = NULL;
    Team *team;
    Py_ssize_t frames, channels, n_rows, out_frames, col;
    if (!PyArg_ParseTuple(args, "y*nny*y*y*y*nw*nn|O", &x, &frames, &channels, &ia, &ib, &ca, &cb, &n_rows, &out,
                          &out_frames, &col, &team_obj))
        return NULL;
    int ok = as_team(team_obj, &team) && need(&x, frames * channels, 4, "x") && need(&ia, n_rows, 4, "ia") && need(&ib, n_rows, 4, "ib")
             && need(&ca, n_rows, 4, "ca") && need(&cb, n_rows, 4, "cb") && need(&out, out_frames * n_rows, 4, "out");
    if (ok && (frames < 0 || col < 0 || col + frames > out_frames)) {
        PyErr_SetString(PyExc_ValueError, "rows: frames outside the history");
        ok = 0;
    }
    const int *a = (const int *)ia.buf, *b = (const int *)ib.buf;
    for (Py_ssize_t r = 0; ok && r < n_rows; r++)
        if (a[r] < 0 || a[r] >= channels || b[r] < 0 || b[r] >= channels) {
            PyErr_SetString(PyExc_ValueError, "rows: channel index outside the input");
            ok = 0;
        }
    float lo = 0.0f, hi = 0.0f;
    int finite = 1;
    if (ok) {
        struct rows_job job = {(const float *)x.buf, frames, channels, n_rows, col, a, b, (const float *)ca.buf,
                               (const float *)cb.buf, (float *)out.buf, {0}, {0}, {0}};
        int parts = team == NULL ? 1 : team->parts;
        Py_BEGIN_ALLOW_THREADS
        team_run(team, rows_part, &job);
        Py_END_ALLOW_THREADS
        for (int p = 0; p < parts; p++) {
            lo = job.lo[p] < lo ? job.lo[p] : lo;
            hi = job.hi[p] > hi ? job.hi[p] : hi;
            finite &= job.finite[p];
        }
    }
    Py_buffer *const held[] = {&x, &ia, &ib, &ca, &cb, &out};
    release_all(held, 6);
    if (!ok)
        return NULL;
    return Py_BuildValue("ddO", (double)lo, (double)hi, finite ? Py_True : Py_False);
}

struct rfft_job {
    const float *x;
    Py_ssize_t x_stride, n_cols, n;
    const int *factors;
    int n_factors;
    const float *tw;
    float *scratch, *out;
};

static void rfft_part(void *arg, int part, int parts)
{
    const struct rfft_job *j = arg;
    Py_ssize_t c0, c1;
    fl_share(j->n_cols, part, parts, &c0, &c1);
    rfft_columns(j->x, j->x_stride, j->n_cols, j->n, j->factors, j->n_factors, j->tw,
                 j->scratch + (Py_ssize_t)part * 4 * (j->n / 2) * FL, j->out, c0, c1);
}

static PyObject *py_rfft(PyObject *self, PyObject *args)
{
    (void)self;
    Py_buffer x, factors, tw, scratch, out;
    PyObject *team_obj = NULL;
    Team *team;
    Py_ssize_t x_stride, n_cols, n;
    if (!PyArg_ParseTuple(args, "y*nnny*y*w*w*|O", &x, &x_stride, &n_cols, &n, &factors, &tw, &scratch, &out,
                          &team_obj))
        return NULL;
    if (!as_team(team_obj, &team)) {
        Py_buffer *const held[] = {&x, &factors, &tw, &scratch, &out};
        release_all(held, 5);
        return NULL;
    }
    int parts = team == NULL ? 1 : team->parts;
    Py_ssize_t M = n / 2, n_factors = factors.len / (Py_ssize_t)sizeof(int), twiddles = M + 1, product = 1;
    const int *fa = (const int *)factors.buf;
    int ok = 1;
    for (Py_ssize_t f = 0; f < n_factors; f++) {
        if (((fa[f] < 2 || fa[f] > 5) && fa[f] != 8) || product * fa[f] > M) {
            ok = 0;
            break;
        }
        product *= fa[f];
        twiddles += (fa[f] - 1) * (M / product);
    }
    if (!ok || n < 2 || n % 2 || product != M || n_cols < 0 || n_cols > x_stride) {
        PyErr_SetString(PyExc_ValueError, "rfft: length, radices or columns do not fit");
        ok = 0;
    }
    ok = ok && need(&x, (n - 1) * x_stride + n_cols, 4, "x") && need(&tw, twiddles, 8, "tw")
         && need(&scratch, 4 * M * FL * parts, 4, "scratch") && need(&out, (M + 1) * n_cols, 8, "out");
    if (ok) {
        struct rfft_job job = {(const float *)x.buf, x_stride, n_cols, n, fa, (int)n_factors, (const float *)tw.buf,
                               (float *)scratch.buf, (float *)out.buf};
        Py_BEGIN_ALLOW_THREADS
        team_run(team, rfft_part, &job);
        Py_END_ALLOW_THREADS
    }
    Py_buffer *const held[] = {&x, &factors, &tw, &scratch, &out};
    release_all(held, 5);
    if (!ok)
        return NULL;
    Py_RETURN_NONE;
}

struct quadform_job {
    const float *y;
    Py_ssize_t row_stride, n_rows, width, f_cols;
    const float *f;
    float *out;
};

static void quadform_part(void *arg, int part, int parts)
{
    const struct quadform_job *j = arg;
    /* whole groups of QF_ROWS rows per part, so that no part re-reads another's rows */
    Py_ssize_t groups = (j->n_rows + QF_ROWS - 1) / QF_ROWS;
    Py_ssize_t q0 = QF_ROWS * part_start(groups, part, parts), q1 = QF_ROWS * part_start(groups, part + 1, parts);
    quadform(j->y, j->row_stride, q0, q1 < j->n_rows ? q1 : j->n_rows, j->width, j->f, j->f_cols, j->out);
}

static PyObject *py_quadform(PyObject *self, PyObject *args)
{
    (void)self;
    Py_buffer y, f, out;
    PyObject *team_obj = NULL;
    Team *team;
    Py_ssize_t n_rows, row_stride, first, width, f_cols;
    if (!PyArg_ParseTuple(args, "y*nnnny*nw*|O", &y, &n_rows, &row_stride, &first, &width, &f, &f_cols, &out,
                          &team_obj))
        return NULL;
    int ok = as_team(team_obj, &team);
    if (ok && !(n_rows >= 0 && width >= 0 && first >= 0 && first + width <= row_stride && f_cols >= 0
                && f_cols % (2 * FL) == 0)) {
        PyErr_SetString(PyExc_ValueError, "quadform: row range or factor columns do not fit");
        ok = 0;
    }
    ok = ok && need(&y, n_rows * row_stride, 4, "y") && need(&f, width * f_cols, 4, "f")
         && need(&out, n_rows, 4, "out");
    if (ok) {
        struct quadform_job job = {(const float *)y.buf + first, row_stride, n_rows, width, f_cols,
                                   (const float *)f.buf, (float *)out.buf};
        Py_BEGIN_ALLOW_THREADS
        team_run(team, quadform_part, &job);
        Py_END_ALLOW_THREADS
    }
    Py_buffer *const held[] = {&y, &f, &out};
    release_all(held, 3);
    if (!ok)
        return NULL;
    Py_RETURN_NONE;
}

/* ---- Power rows as text ------------------------------------------------------
 * Each value as Python's "%.3f" would print it, at a tenth of its cost: a float32 times 1000 is
 * exact in a double (24 + 10 bits), so rounding that product to an integer, half to even as
 * nearbyint does in the default rounding mode, is the correctly rounded three-decimal value. The
 * sign comes from the float (-0.0004 prints "-0.000", as Python does); magnitudes past 2^53 / 1000,
 * NaN and the infinities go through snprintf. */
#include <math.h>
#include <stdio.h>
#include <stdint.h>

static char *put_fixed3(char *p, float v)
{
    if (!isfinite(v) || fabs((double)v) >= 9.0e12)
        return p + snprintf(p, 64, isnan(v) ? "nan" : "%.3f", (double)v);
    double q = nearbyint((double)v * 1000.0);
    if (signbit(v))
        *p++ = '-';
    uint64_t a = (uint64_t)fabs(q), whole = a / 1000, frac = a % 1000;
    char digits[24];
    int n = 0;
    do {
        digits[n++] = (char)('0' + whole % 10);
        whole /= 10;
    } while (whole);
    while (n)
        *p++ = digits[--n];
    p[0] = '.';
    p[1] = (char)('0' + frac / 100);
    p[2] = (char)('0' + frac / 10 % 10);
    p[3] = (char)('0' + frac % 10);
    return p + 4;
}

static PyObject *py_fixed3(PyObject *self, PyObject *args)
{
    (void)self;
    Py_buffer v;
    Py_ssize_t n_rows, n_cols;
    if (!PyArg_ParseTuple(args, "y*nn", &v, &n_rows, &n_cols))
        return NULL;
    PyObject *rows = NULL;
    char *text = NULL;
    if (!(n_rows >= 0 && n_cols >= 0) || !need(&v, n_rows * n_cols, 4, "values"))
        goto done;
    /* widest value: "-" and 39 digits of FLT_MAX, ".", 3 decimals, "," */
    text = PyMem_Malloc((size_t)(n_cols + 1) * 48);
    rows = PyList_New(n_rows);
    if (text == NULL || rows == NULL) {
        Py_CLEAR(rows);
        if (text == NULL)
            PyErr_NoMemory();
        goto done;
    }
    const float *x = (const float *)v.buf;
    for (Py_ssize_t r = 0; r < n_rows; r++) {
        char *p = text;
        for (Py_ssize_t c = 0; c < n_cols; c++) {
            if (c)
                *p++ = ',';
            p = put_fixed3(p, x[r * n_cols + c]);
        }
        PyObject *row = PyUnicode_DecodeASCII(text, p - text, NULL);
        if (row == NULL) {
            Py_CLEAR(rows);
            goto done;
        }
        PyList_SET_ITEM(rows, r, row);
    }
done:
    PyMem_Free(text);
    PyBuffer_Release(&v);
    return rows;
}

static PyMethodDef methods[] = {
    {"steer", py_steer, METH_VARARGS,
     "steer(h_re, h_im, v, n_blocks, v_bins, k0, n_bins, n_rows, n_plain, n_beams, main_out, mirror_out, n_out, y, "
     "lanes[, team]): per-bin steered sums, beams in groups of lanes (4 or 8); the bins split across the team."},
    {"steer_start", py_steer_start, METH_VARARGS,
     "steer_start(... the arguments of steer ...) -> Started: steer started on the team's helpers, returning at "
     "once; y is ready after join(). A team call made meanwhile by the same thread ends it first."},
    {"quadform", py_quadform, METH_VARARGS,
     "quadform(y, n_rows, row_stride, first, width, f, f_cols, out[, team]): out[q] = |y[q, first:first+width] @ f|^2 "
     "for float rows of y; f (width, f_cols) with f_cols a multiple of 16; the rows split across the team."},
    {"rows", py_rows, METH_VARARGS,
     "rows(x, frames, channels, ia, ib, ca, cb, n_rows, out, out_frames, col[, team]) -> (min, max, all finite): "
     "history rows from input frames, and a scan of every input value; the frames split across the team."},
    {"rfft", py_rfft, METH_VARARGS,
     "rfft(x, x_stride, n_cols, n, factors, tw, scratch, out[, team]): real FFT down the columns of a frame; "
     "column groups split across the team, each part with its own scratch (4 n/2 8 floats per thread)."},
    {"fixed3", py_fixed3, METH_VARARGS,
     "fixed3(values, n_rows, n_cols) -> list of str: each row of float32 values as comma-separated '%.3f' text."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_kernels", "Compiled inner loops of the beamformer.",
                                    -1, methods};

PyMODINIT_FUNC PyInit__kernels(void)
{
    if (PyType_Ready(&TeamType) < 0 || PyType_Ready(&StartedType) < 0)
        return NULL;
    PyObject *m = PyModule_Create(&module);
    if (m == NULL)
        return NULL;
    Py_INCREF(&TeamType);
    if (PyModule_AddObject(m, "Team", (PyObject *)&TeamType) < 0) {
        Py_DECREF(&TeamType);
        Py_DECREF(m);
        return NULL;
    }
    return m;
}
