/* The steered sums of _kernels.c for one vector width, included once per width.
 *
 * Before including, define LANES (beams per vector: the steering matrices hold
 * beams padded to a multiple of it). Names get the width as a suffix
 * (steer8, steer4): a few formed beams (the audio beams) fill a 4-wide group,
 * which halves the steering read every block, the cost that counts when the
 * steering streams from the last-level cache. */
#define S_CAT_(a, b) a##b
#define S_CAT(a, b) S_CAT_(a, b)
#define S(name) S_CAT(name, LANES)
typedef float SV __attribute__((vector_size(4 * LANES)));

static inline __attribute__((always_inline)) SV S(load)(const float *p)
{
    SV v;
    memcpy(&v, p, sizeof v);
    return v;
}

/* Accumulate rows [r0, r1) of bin kk into one group of LANES beams, for nk
 * blocks of spectra (v + j * block_stride floats is block j, bins row_stride
 * complex values apart). With one block,
 * even and odd rows go to separate accumulators so that two chains of adds
 * are in flight per output. ``turn`` multiplies the spectra by j. nk is a
 * constant at every call, so the loops over blocks unroll. */
static inline __attribute__((always_inline)) void S(group_rows)(
    const float *h_re, const float *h_im, const float *v, Py_ssize_t row_stride, Py_ssize_t block_stride,
    Py_ssize_t kk, Py_ssize_t r0, Py_ssize_t r1, Py_ssize_t stride, int turn, const int nk, const int cplx,
    SV *ar, SV *ai)
{
    const int par = nk == 1 ? 2 : 1;
    SV xr[MAX_BLOCKS] = {{0}}, xi[MAX_BLOCKS] = {{0}};
    Py_ssize_t r = r0;
    for (; r + par <= r1; r += par) {
        for (int p = 0; p < par; p++) {
            SV h = S(load)(h_re + (r + p) * stride), g = {0};
            if (cplx)
                g = S(load)(h_im + (r + p) * stride);
            for (int j = 0; j < nk; j++) {
                const float *s = v + j * block_stride + 2 * (kk * row_stride + r + p);
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
        SV h = S(load)(h_re + r * stride), g = {0};
        if (cplx)
            g = S(load)(h_im + r * stride);
        for (int j = 0; j < nk; j++) {
            const float *s = v + j * block_stride + 2 * (kk * row_stride + r);
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
        ar[j] += xr[j] + (nk == 1 ? xr[1] : (SV){0});
        ai[j] += xi[j] + (nk == 1 ? xi[1] : (SV){0});
    }
}

/* One bin, one group of beams, nk blocks: y[j, b0 + b, k] for b < nb. */
static inline __attribute__((always_inline)) void S(bin_group)(
    const float *hr, const float *hi, const float *v, Py_ssize_t block_stride, Py_ssize_t kk,
    Py_ssize_t n_rows, Py_ssize_t n_plain, Py_ssize_t stride, const int nk, const int cplx, float *y,
    const int *main_out, const int *mirror_out, Py_ssize_t n_out, Py_ssize_t n_bins, Py_ssize_t nb)
{
    /* a: the plain rows' sum, then t: the turned rows' sum; beam = a + t, its mirror image a - t */
    SV a_re[MAX_BLOCKS] = {{0}}, a_im[MAX_BLOCKS] = {{0}}, t_re[MAX_BLOCKS] = {{0}}, t_im[MAX_BLOCKS] = {{0}};
    S(group_rows)(hr, hi, v, n_rows, block_stride, kk, 0, n_plain, stride, 0, nk, cplx, a_re, a_im);
    S(group_rows)(hr, hi, v, n_rows, block_stride, kk, n_plain, n_rows, stride, 1, nk, cplx, t_re, t_im);
    for (int j = 0; j < nk; j++) {
        SV p_re = a_re[j] + t_re[j], p_im = a_im[j] + t_im[j];
        SV m_re = a_re[j] - t_re[j], m_im = a_im[j] - t_im[j];
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
 * v_bins, rows) interleaved, the layout rfft_columns writes; rows r >= n_plain
 * are multiplied by j first (the
 * difference rows of mirror pairs); y: complex64 (blocks, n_out, bins).
 * Beam b is written to output beam main_out[b]; where mirror_out[b] >= 0,
 * the sum with the turned rows' part negated goes to output beam
 * mirror_out[b] (the mirror-image direction of a symmetric array, whose
 * steering on the pair rows is the same but for the sign of the difference
 * rows), so one pass forms both.
 *
 * Only bins [kb0, kb1) are formed (a team's share of the call; bins are
 * independent and write separate outputs).
 *
 * Loop order: a group's steering is read once, front to back, for up to
 * MAX_BLOCKS blocks; bins run inside groups so that the output lines being
 * written (one per beam and block) stay in the first-level cache. */
CLONES static void S(steer)(const float *h_re, const float *h_im, const float *v, Py_ssize_t n_blocks,
                         Py_ssize_t v_bins, Py_ssize_t k0, Py_ssize_t n_bins, Py_ssize_t n_rows,
                         Py_ssize_t n_plain, Py_ssize_t n_beams, const int *main_out, const int *mirror_out,
                         Py_ssize_t n_out, float *y, Py_ssize_t kb0, Py_ssize_t kb1)
{
    Py_ssize_t block_stride = 2 * n_rows * v_bins;
    Py_ssize_t group_size = n_bins * n_rows * LANES;
    for (Py_ssize_t j0 = 0; j0 < n_blocks; j0 += MAX_BLOCKS) {
        Py_ssize_t nk = n_blocks - j0 < MAX_BLOCKS ? n_blocks - j0 : MAX_BLOCKS;
        const float *vj = v + j0 * block_stride;
        float *yj = y + 2 * j0 * n_out * n_bins;
        for (Py_ssize_t b0 = 0; b0 < n_beams; b0 += LANES) {
            Py_ssize_t nb = n_beams - b0 < LANES ? n_beams - b0 : LANES;
            for (Py_ssize_t k = kb0; k < kb1; k++) {
                const float *hr = h_re + (b0 / LANES) * group_size + k * n_rows * LANES;
                const float *hi = h_im == NULL ? NULL : h_im + (b0 / LANES) * group_size + k * n_rows * LANES;
                float *yk = yj + 2 * k;
#define BIN_GROUP(NK, CPLX) S(bin_group)(hr, hi, vj, block_stride, k0 + k, n_rows, n_plain, LANES, NK, CPLX, \
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

#undef SV
#undef S
#undef S_CAT
#undef S_CAT_
