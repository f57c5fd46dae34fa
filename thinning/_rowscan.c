/* The per-row pass of the edge measurement, compiled (see thinning/rowscan.py).
 *
 * Plain C functions on C arrays, called through ctypes (which releases the GIL
 * for the call, so a block is measured while the decoding threads go on). What they compute
 * is the numpy path of thinning/edges.py (_measure_rows_numpy), row by row: the flicker gain
 * of each frame, each row's dark extent against the threshold map, the deficit integrated
 * over the two edge zones (one window for a thin row), the rim level of thick steady rows,
 * and the faint trace of rows without a clear shadow.
 *
 * Built as an optional extension module (setup.py); the tiny module init below only lets
 * Python find the file.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#define BRIDGE_PX 3

/* First and last column of the dark run holding the row's darkest pixel (darkness: larger is
 * darker, first maximum wins). Runs closer than BRIDGE_PX, or separated by a gap narrower
 * than a quarter of the narrower run beside it, are one run. When the darkest pixel lies in a
 * gap, the whole extent lo..hi is kept. */
static void main_run(const unsigned char *mask, const float *darkness, int64_t lo, int64_t hi,
                     int64_t *out_lo, int64_t *out_hi)
{
    int64_t darkest = lo;
    for (int64_t c = lo + 1; c <= hi; c++)
        if (darkness[c] > darkness[darkest]) darkest = c;
    int64_t run_start = -1, run_stop = -1, c = lo;
    while (c <= hi) {
        if (!mask[c]) { c++; continue; }
        int64_t start = c;
        while (c <= hi && mask[c]) c++;
        int64_t stop = c - 1;
        if (run_start < 0) { run_start = start; run_stop = stop; continue; }
        int64_t gap = start - run_stop - 1;
        int64_t narrower = run_stop - run_start + 1 < stop - start + 1 ? run_stop - run_start + 1
                                                                       : stop - start + 1;
        if (gap <= BRIDGE_PX || gap <= 0.25 * narrower) {
            run_stop = stop;
        } else {
            if (run_start <= darkest && darkest <= run_stop) {
                *out_lo = run_start; *out_hi = run_stop; return;
            }
            run_start = start; run_stop = stop;
        }
    }
    if (run_start <= darkest && darkest <= run_stop) {
        *out_lo = run_start; *out_hi = run_stop; return;
    }
    *out_lo = lo; *out_hi = hi;
}

static int compare_double(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

#define DEFINE_KERNELS(SUFFIX, PIXEL)                                                           \
                                                                                                \
/* Flicker gain (upper median of the margin ratios of gain_rows) of each frame, and whether a   \
 * margin pixel of those rows clips (then the caller judges the gain by the unclipped rows). */ \
int frame_gains_##SUFFIX(const PIXEL *const *bands, int64_t stride, int64_t nb, int64_t n,      \
                         int64_t w,                                                             \
                         const int64_t *gain_rows, int64_t g, const double *margin_light,       \
                         int64_t k, double saturation, double *gains, unsigned char *clipped)   \
{                                                                                               \
    double *ratio = malloc((g > 0 ? g : 1) * sizeof(double));                                   \
    if (!ratio) return -1;                                                                      \
    for (int64_t b = 0; b < nb; b++) {                                                          \
        const PIXEL *frame = bands[b];                                                          \
        clipped[b] = 0;                                                                         \
        for (int64_t i = 0; i < g; i++) {                                                       \
            const PIXEL *row = frame + gain_rows[i] * stride;                                   \
            int64_t total = 0;                                                                  \
            PIXEL top = 0;                                                                      \
            for (int64_t c = 0; c < k; c++) {                                                   \
                total += (int64_t)row[c] + (int64_t)row[w - k + c];                             \
                top = row[c] > top ? row[c] : top;                                              \
                top = row[w - k + c] > top ? row[w - k + c] : top;                              \
            }                                                                                   \
            ratio[i] = (double)total / margin_light[gain_rows[i]];                              \
            if ((double)top >= saturation) clipped[b] = 1;                                      \
        }                                                                                       \
        if (g > 0) {                                                                            \
            qsort(ratio, g, sizeof(double), compare_double);                                    \
            gains[b] = ratio[g / 2];                                                            \
        } else {                                                                                \
            gains[b] = 1.0;                                                                     \
        }                                                                                       \
    }                                                                                           \
    free(ratio);                                                                                \
    return 0;                                                                                   \
}                                                                                               \
                                                                                                \
/* Rows of one frame without a clear shadow: their faintest trace of one (set in place). */     \
static void faint_rows_##SUFFIX(const PIXEL *block, int64_t stride, int64_t n, int64_t w,       \
                                const float *inv_light,                                         \
                                const unsigned char *has, double *centre, double *peak,         \
                                double *cut, double gain, double scale, int64_t margin)         \
{                                                                                               \
    int64_t count = 0;                                                                          \
    double ym = 0.0, cm = 0.0;                                                                  \
    for (int64_t r = 0; r < n; r++)                                                             \
        if (has[r]) { count++; ym += r; cm += centre[r]; }                                      \
    if (count == n) return;                                                                     \
    float s32 = (float)scale, g32 = (float)gain;                                                \
    for (int64_t r = 0; r < n; r++) {                                                           \
        if (has[r]) continue;                                                                   \
        float low = INFINITY;                                                                   \
        for (int64_t c = 0; c < w; c++) {                                                       \
            float v = (float)block[r * stride + c] * inv_light[r * w + c];                      \
            low = v < low ? v : low;                                                            \
        }                                                                                       \
        peak[r] = (1.0f - low / g32) * s32;                                                     \
    }                                                                                           \
    if (count < 5) return;                                                                      \
    ym /= count;                                                                                \
    cm /= count;                                                                                \
    double syy = 0.0, syc = 0.0;                                                                \
    for (int64_t r = 0; r < n; r++)                                                             \
        if (has[r]) { syy += (r - ym) * (r - ym); syc += (r - ym) * (centre[r] - cm); }         \
    double slope = syc / (syy > 1e-9 ? syy : 1e-9);                                             \
    if (!(isfinite(slope) && isfinite(cm))) return;                                             \
    int64_t half = margin + 2;                                                                  \
    for (int64_t r = 0; r < n; r++) {                                                           \
        if (has[r]) continue;                                                                   \
        int64_t guess = (int64_t)rint(cm + slope * (r - ym));                                   \
        if (guess - half < 0 || guess + half >= w) continue; /* window leaves the band */       \
        double total = 0.0, moment = 0.0;                                                       \
        for (int64_t c = guess - half; c <= guess + half; c++) {                                \
            float d = (1.0f - ((float)block[r * stride + c] * inv_light[r * w + c]) / g32) * s32; \
            total += d;                                                                         \
            moment += d * (double)c;                                                            \
        }                                                                                       \
        cut[r] = total;                                                                         \
        centre[r] = moment / total;                                                             \
    }                                                                                           \
}                                                                                               \
                                                                                                \
/* Row measurements of a block of bands (bands[b]: first pixel of frame b's band, rows `stride`  \
 * pixels apart); outputs (frame, row), preset by the caller:                                   \
 * has = 0, centre = cut = rim_ratio = NaN, core_n = 0, truncated = 0, light = 1. */            \
int scan_rows_##SUFFIX(const PIXEL *const *bands, int64_t stride, int64_t nb, int64_t n,        \
                       int64_t w,                                                               \
                       const PIXEL *thresholds, const int64_t *map_of_frame,                    \
                       const float *inv_light, const double *gains,                             \
                       double saturation, double scale, int64_t margin, int64_t core,           \
                       unsigned char *has, double *peak, double *centre, double *core_n,        \
                       double *cut, unsigned char *truncated, double *rim_ratio, double *light) \
{                                                                                               \
    int64_t nwords = (w + 7) / 8, zone = margin + core;                                         \
    uint64_t *words = calloc(nwords, sizeof(uint64_t));                                         \
    float *darkness = malloc(w * sizeof(float));                                                \
    int64_t *lj = malloc(n * sizeof(int64_t)), *rj = malloc(n * sizeof(int64_t));               \
    unsigned char *thick = malloc(n);                                                           \
    if (!words || !darkness || !lj || !rj || !thick) {                                          \
        free(words); free(darkness); free(lj); free(rj); free(thick);                           \
        return -1;                                                                              \
    }                                                                                           \
    unsigned char *mask = (unsigned char *)words; /* the row's dark pixels, eight to a word */  \
    float s32 = (float)scale;                                                                   \
    for (int64_t b = 0; b < nb; b++) {                                                          \
        const PIXEL *frame = bands[b];                                                          \
        const PIXEL *thr = thresholds + map_of_frame[b] * n * w;                                \
        double gain = gains[b];                                                                 \
        float g32 = (float)gain, factor = (float)(-scale / gain);                               \
        int64_t o = b * n; /* offset of this frame's rows in the outputs */                    \
        for (int64_t r = 0; r < n; r++) {                                                       \
            const PIXEL *row = frame + r * stride, *t = thr + r * w;                            \
            const float *inv = inv_light + r * w;                                               \
            for (int64_t c = 0; c < w; c++) mask[c] = row[c] < t[c];                            \
            light[o + r] = (mask[0] && mask[w - 1]) ? 0.0 : 1.0;                                \
            int64_t first = 0;                                                                  \
            while (first < nwords && words[first] == 0) first++;                                \
            if (first == nwords) { /* no shadow on this row: its faint trace, below */          \
                lj[r] = 0; rj[r] = w - 1; thick[r] = 0;                                         \
                continue;                                                                       \
            }                                                                                   \
            int64_t left = 8 * first;                                                           \
            while (!mask[left]) left++;                                                         \
            int64_t last = nwords - 1;                                                          \
            while (words[last] == 0) last--;                                                    \
            int64_t right = 8 * last + 7 < w - 1 ? 8 * last + 7 : w - 1;                        \
            while (!mask[right]) right--;                                                       \
            int64_t probe = 2 * core < right - left + 1 ? 2 * core : right - left + 1;          \
            for (int64_t s = 0; s < probe; s++) {                                               \
                int64_t head = left + s < w - 1 ? left + s : w - 1;                             \
                int64_t tail = right - s > 0 ? right - s : 0;                                   \
                if (!(mask[head] && mask[tail])) {                                              \
                    for (int64_t c = left; c <= right; c++) darkness[c] = -((float)row[c] * inv[c]); \
                    main_run(mask, darkness, left, right, &left, &right);                       \
                    break;                                                                      \
                }                                                                               \
            }                                                                                   \
            has[o + r] = 1;                                                                     \
            lj[r] = left; rj[r] = right;                                                        \
            int64_t core_start = left + core, core_stop = right + 1 - core;                     \
            int wide = core_stop >= core_start;                                                 \
            thick[r] = wide;                                                                    \
            int64_t base = left - margin;                                                       \
            int64_t stop = wide ? w : (right + 1 + margin < w ? right + 1 + margin : w);        \
            double left_sum = 0.0, right_sum = 0.0, moment = 0.0;                               \
            float top = 0.0f;                                                                   \
            for (int64_t s = 0; s < 2 * zone; s++) {                                            \
                int64_t col = (wide && s >= zone) ? core_stop + (s - zone) : base + s;          \
                if (col < 0 || col >= stop) continue;                                           \
                PIXEL v = row[col];                                                             \
                if ((double)v >= saturation) continue; /* clipped: no deficit known */          \
                float d = ((float)v * inv[col]) * factor + s32;                                 \
                if (s < zone) left_sum += d; else right_sum += d;                               \
                moment += (double)s * d;                                                        \
                top = d > top ? d : top;                                                        \
            }                                                                                   \
            double edge_sum = left_sum + right_sum;                                             \
            if (wide) {                                                                         \
                core_n[o + r] = (double)(core_stop - core_start);                               \
                centre[o + r] = 0.5 * ((core_start - 0.5 - left_sum) + (core_stop - 0.5 + right_sum)); \
                peak[o + r] = 1.0;                                                              \
                truncated[o + r] = base < 0 || core_stop + margin > w;                          \
            } else {                                                                            \
                centre[o + r] = base + moment / edge_sum;                                       \
                peak[o + r] = top;                                                              \
                truncated[o + r] = base < 0 || right + 1 + margin > w;                          \
            }                                                                                   \
            cut[o + r] = edge_sum + core_n[o + r];                                              \
        }                                                                                       \
        /* rim level of thick rows whose edges run along the axis */                            \
        for (int64_t r = 2; r < n - 2; r++) {                                                   \
            if (!(thick[r] && has[o + r] && core_n[o + r] > 12)) continue;                      \
            if (llabs(lj[r + 2] - lj[r - 2]) > 1 || llabs(rj[r + 2] - rj[r - 2]) > 1) continue; \
            const PIXEL *row = frame + r * stride;                                              \
            const float *inv = inv_light + r * w;                                               \
            int64_t a0 = lj[r] + core, b0 = rj[r] + 1 - core;                                   \
            float total = (float)row[a0] * inv[a0] + (float)row[a0 + 1] * inv[a0 + 1];          \
            total += (float)row[b0 - 1] * inv[b0 - 1];                                          \
            total += (float)row[b0 - 2] * inv[b0 - 2];                                          \
            rim_ratio[o + r] = (total * 0.25f) / g32;                                           \
        }                                                                                       \
        faint_rows_##SUFFIX(frame, stride, n, w, inv_light, has + o, centre + o, peak + o, cut + o,     \
                            gain, scale, margin);                                               \
    }                                                                                           \
    free(words); free(darkness); free(lj); free(rj); free(thick);                               \
    return 0;                                                                                   \
}

DEFINE_KERNELS(u8, uint8_t)
DEFINE_KERNELS(u16, uint16_t)

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_rowscan",
                                    "Compiled row pass of thinning.edges (used through ctypes).",
                                    -1, NULL};

PyMODINIT_FUNC PyInit__rowscan(void) { return PyModule_Create(&module); }
