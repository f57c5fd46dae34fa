/* The per-row pass of the edge measurement, compiled (see thinning/measure/compiled.py).
 *
 * Plain C functions on C arrays, called through ctypes (which releases the GIL
 * for the call, so a block is measured while the decoding threads go on). What they compute
 * is the numpy path of thinning/measure/rows.py, profile.py and neck.py, row by row: the flicker gain
 * of each frame, each row's dark extent against the threshold map, the deficit integrated
 * over the two edge zones (one window for a thin row), the rim level of thick steady rows,
 * and the faint trace of rows without a clear shadow (scan_rows); then the end bodies, the
 * free span, the axis and the quadratic neck fit of each frame (necks); then the neck rows
 * measured again against the liquid's own shadow, their pixels read from the bands
 * (liquid_widths: thinning/measure/liquid.py).
 *
 * Built as an optional extension module (setup.py); the tiny module init below only lets
 * Python find the file.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <float.h>
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#if defined(__SSE2__) && (defined(__GNUC__) || defined(__clang__)) && !defined(ROWSCAN_NO_SIMD)
#include <emmintrin.h>
#define ROWSCAN_SSE2 1
#endif

#define BRIDGE_PX 3

/* The first and the last column of a row darker than its threshold (w, or -1, when none): the
 * dark extent of the row, searched from each end, sixteen 8-bit (eight 16-bit) pixels at a time
 * where the processor has SSE2. */
static int64_t first_dark_u8(const uint8_t *row, const uint8_t *t, int64_t w)
{
    int64_t c = 0;
#ifdef ROWSCAN_SSE2
    for (; c + 16 <= w; c += 16) {
        __m128i a = _mm_loadu_si128((const __m128i *)(row + c));
        __m128i b = _mm_loadu_si128((const __m128i *)(t + c));
        unsigned dark = ~(unsigned)_mm_movemask_epi8(_mm_cmpeq_epi8(_mm_max_epu8(a, b), a)) & 0xFFFFu;
        if (dark) return c + __builtin_ctz(dark);
    }
#endif
    for (; c < w; c++)
        if (row[c] < t[c]) return c;
    return w;
}

static int64_t last_dark_u8(const uint8_t *row, const uint8_t *t, int64_t w)
{
    int64_t c = w; /* columns [0, c) not yet searched */
#ifdef ROWSCAN_SSE2
    for (; c >= 16; c -= 16) {
        __m128i a = _mm_loadu_si128((const __m128i *)(row + c - 16));
        __m128i b = _mm_loadu_si128((const __m128i *)(t + c - 16));
        unsigned dark = ~(unsigned)_mm_movemask_epi8(_mm_cmpeq_epi8(_mm_max_epu8(a, b), a)) & 0xFFFFu;
        if (dark) return c - 16 + (31 - __builtin_clz(dark));
    }
#endif
    for (c = c - 1; c >= 0; c--)
        if (row[c] < t[c]) return c;
    return -1;
}

static int64_t first_dark_u16(const uint16_t *row, const uint16_t *t, int64_t w)
{
    int64_t c = 0;
#ifdef ROWSCAN_SSE2
    const __m128i zero = _mm_setzero_si128();
    for (; c + 8 <= w; c += 8) {
        __m128i a = _mm_loadu_si128((const __m128i *)(row + c));
        __m128i b = _mm_loadu_si128((const __m128i *)(t + c));
        /* a < b exactly where the saturated difference b - a is not zero */
        unsigned dark = ~(unsigned)_mm_movemask_epi8(_mm_cmpeq_epi16(_mm_subs_epu16(b, a), zero)) & 0xFFFFu;
        if (dark) return c + __builtin_ctz(dark) / 2;
    }
#endif
    for (; c < w; c++)
        if (row[c] < t[c]) return c;
    return w;
}

static int64_t last_dark_u16(const uint16_t *row, const uint16_t *t, int64_t w)
{
    int64_t c = w;
#ifdef ROWSCAN_SSE2
    const __m128i zero = _mm_setzero_si128();
    for (; c >= 8; c -= 8) {
        __m128i a = _mm_loadu_si128((const __m128i *)(row + c - 8));
        __m128i b = _mm_loadu_si128((const __m128i *)(t + c - 8));
        unsigned dark = ~(unsigned)_mm_movemask_epi8(_mm_cmpeq_epi16(_mm_subs_epu16(b, a), zero)) & 0xFFFFu;
        if (dark) return c - 8 + (31 - __builtin_clz(dark)) / 2;
    }
#endif
    for (c = c - 1; c >= 0; c--)
        if (row[c] < t[c]) return c;
    return -1;
}

/* First and last column of the dark run holding the row's darkest pixel (darkness = -I / light
 * field: larger is darker, first maximum wins). Runs closer than BRIDGE_PX, separated by a gap
 * narrower than a quarter of the narrower run beside it, or by a gap whose mean deficit
 * 1 + darkness / gain is at least `dim` (the bright lens band of a refracting thread, which
 * still loses light, unlike the background beside a speck) are one run. When the darkest
 * pixel lies in a gap, the whole extent lo..hi is kept. */
static void main_run(const unsigned char *mask, const float *darkness, int64_t lo, int64_t hi,
                     double gain, double dim, int64_t *out_lo, int64_t *out_hi)
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
        double gap_deficit = 0.0;
        for (int64_t g = run_stop + 1; g < start; g++) gap_deficit += 1.0 + darkness[g] / gain;
        gap_deficit /= (double)(gap > 0 ? gap : 1);
        if (gap <= BRIDGE_PX || gap <= 0.25 * narrower || gap_deficit >= dim) {
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
/* Deficit summed over columns [first, stop) of a row (from column 0 on), its first moment in   \
 * zone steps (step s0 at column `first`) and its peak; pixels at saturation carry none. */    \
static inline void zone_sums_##SUFFIX(const PIXEL *row, const float *inv, int64_t first,        \
                                      int64_t stop, int64_t s0, float factor, float s32,        \
                                      double saturation, double *sum, double *moment,           \
                                      float *top)                                               \
{                                                                                               \
    double total = 0.0, first_moment = 0.0;                                                     \
    float peak = *top;                                                                          \
    for (int64_t col = first > 0 ? first : 0; col < stop; col++) {                              \
        PIXEL v = row[col];                                                                     \
        float d = (double)v >= saturation ? 0.0f : ((float)v * inv[col]) * factor + s32;       \
        total += d;                                                                             \
        first_moment += (double)(s0 + col - first) * d;                                         \
        peak = d > peak ? d : peak;                                                             \
    }                                                                                           \
    *sum += total;                                                                              \
    *moment += first_moment;                                                                    \
    *top = peak;                                                                                \
}                                                                                               \
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
        double line = cm + slope * (r - ym);                                                    \
        if (!(fabs(line) < 1e15)) continue; /* far outside the band (and no integer overflow) */  \
        int64_t guess = (int64_t)rint(line);                                                    \
        if (guess - half < 0 || guess + half >= w) continue;                                    \
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
                       double dim,                                                              \
                       unsigned char *has, double *peak, double *centre, double *core_n,        \
                       double *cut, unsigned char *truncated, double *rim_ratio, double *light) \
{                                                                                               \
    int64_t zone = margin + core;                                                               \
    unsigned char *mask = malloc(w); /* the dark pixels of a row with a gap, where needed */    \
    float *darkness = malloc(w * sizeof(float));                                                \
    int64_t *lj = malloc(n * sizeof(int64_t)), *rj = malloc(n * sizeof(int64_t));               \
    unsigned char *thick = malloc(n);                                                           \
    if (!mask || !darkness || !lj || !rj || !thick) {                                           \
        free(mask); free(darkness); free(lj); free(rj); free(thick);                            \
        return -1;                                                                              \
    }                                                                                           \
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
            light[o + r] = (row[0] < t[0] && row[w - 1] < t[w - 1]) ? 0.0 : 1.0;                \
            int64_t left = first_dark_##SUFFIX(row, t, w);                                      \
            if (left == w) { /* no shadow on this row: its faint trace, below */                \
                lj[r] = 0; rj[r] = w - 1; thick[r] = 0;                                         \
                continue;                                                                       \
            }                                                                                   \
            int64_t right = last_dark_##SUFFIX(row, t, w);                                      \
            int64_t probe = 2 * core < right - left + 1 ? 2 * core : right - left + 1;          \
            for (int64_t s = 0; s < probe; s++) {                                               \
                int64_t head = left + s < w - 1 ? left + s : w - 1;                             \
                int64_t tail = right - s > 0 ? right - s : 0;                                   \
                if (!(row[head] < t[head] && row[tail] < t[tail])) { /* a gap near an edge */    \
                    for (int64_t c = left; c <= right; c++) {                                   \
                        mask[c] = row[c] < t[c];                                                \
                        darkness[c] = -((float)row[c] * inv[c]);                                \
                    }                                                                           \
                    main_run(mask, darkness, left, right, gain, dim, &left, &right);            \
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
            /* the two zones: columns base + s (s < zone), then (core_stop or base + zone) + s */ \
            int64_t right_start = wide ? core_stop : base + zone;                               \
            zone_sums_##SUFFIX(row, inv, base, base + zone < stop ? base + zone : stop, 0,       \
                               factor, s32, saturation, &left_sum, &moment, &top);              \
            zone_sums_##SUFFIX(row, inv, right_start,                                           \
                               right_start + zone < stop ? right_start + zone : stop, zone,      \
                               factor, s32, saturation, &right_sum, &moment, &top);             \
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
    free(mask); free(darkness); free(lj); free(rj); free(thick);                                \
    return 0;                                                                                   \
}

/* Straight-line direction of the centre line over the rows `use` (lateral px per axial px),
 * kept within `bend` of `base`; `base` with fewer than 5 rows (see edges.axis_slopes). */
/* The rows of a neck's quadratic fit (the rule of thinning.measure.neck.necks_of): the thinnest
   row *i_min of smooth[0..n), the contiguous run around it whose smoothed width stays within
   max(3 row_noise, 1.5 %) of it, capped at max_half rows each side; its middle *mid and
   half-length *half, at least min_half. */
static void neck_window(const double *smooth, int64_t n, double row_noise, int64_t max_half,
                        int64_t min_half, int64_t *i_min, int64_t *mid, int64_t *half)
{
    int64_t i0 = 0;
    for (int64_t r = 1; r < n; r++)
        if (smooth[r] < smooth[i0]) i0 = r;
    double w0 = smooth[i0], spread = 0.015 * w0;
    double level = w0 + (3.0 * row_noise > spread ? 3.0 * row_noise : spread);
    int64_t before = -1, after = n;
    for (int64_t r = i0 - 1; r >= 0; r--)
        if (!(smooth[r] <= level)) { before = r; break; }
    for (int64_t r = i0 + 1; r < n; r++)
        if (!(smooth[r] <= level)) { after = r; break; }
    int64_t lo = before + 1 > i0 - max_half ? before + 1 : i0 - max_half;
    int64_t hi = after - 1 < i0 + max_half ? after - 1 : i0 + max_half;
    int64_t h = (hi - lo + 1) / 2; /* 0 <= lo <= i0 <= hi */
    *i_min = i0;
    *mid = (lo + hi) / 2;
    *half = h > min_half ? h : min_half;
}


static double axis_slope(const double *y, const double *centre, const unsigned char *use, int64_t n,
                         double base, double bend)
{
    int64_t count = 0;
    double mean = 0.0;
    for (int64_t r = 0; r < n; r++)
        if (use[r]) { count++; mean += y[r]; }
    if (count < 5) return base;
    mean /= count;
    double syc = 0.0, syy = 0.0;
    for (int64_t r = 0; r < n; r++)
        if (use[r]) { double dy = y[r] - mean; syc += dy * centre[r]; syy += dy * dy; }
    double slope = syc / syy;
    if (slope < base - bend) slope = base - bend;
    else if (slope > base + bend) slope = base + bend;
    return slope;
}

/* The neck of each frame of a block from its row measurements: edges.profiles_of followed by
 * neck.necks_of, fused (same arithmetic). Inputs (frame, row) as scan_rows gives them, with
 * `fraction` the shadow level over backlight to scale each frame to (NaN: the layout's).
 * end_kind: 0 no body at that end of the axis, 1 a body `end_width` wide, 2 a band-filling one.
 * Outputs per frame. Returns 0, or -1 when a row buffer cannot be allocated. */
int necks(int64_t nb, int64_t n, const double *cut_in, const double *core_n, const double *peak_in,
          const double *centre_in, const unsigned char *truncated, const double *light,
          const double *fraction, double layout_fraction, const int64_t *end_kind,
          const double *end_width, int64_t face_px, double axial0, double band0,
          double present_level, double layout_slope, double bend, double row_noise,
          int64_t max_half, int64_t min_half,
          double *diameter, double *position, double *angle_deg, double *lateral,
          double *min_contrast, int64_t *fit_rows, unsigned char *beads, unsigned char *connected,
          unsigned char *seen, double *gap)
{
    double *cut = malloc(n * sizeof(double)), *smooth = malloc(n * sizeof(double));
    double *y = malloc(n * sizeof(double)), *centre = malloc(n * sizeof(double));
    double *left = malloc(n * sizeof(double)), *peak = malloc(n * sizeof(double));
    unsigned char *body = malloc(n), *valid = malloc(n), *sel = malloc(n);
    if (!cut || !smooth || !y || !centre || !left || !peak || !body || !valid || !sel) {
        free(cut); free(smooth); free(y); free(centre); free(left); free(peak);
        free(body); free(valid); free(sel);
        return -1;
    }
    for (int64_t r = 0; r < n; r++) y[r] = r + axial0;
    for (int64_t b = 0; b < nb; b++) {
        const double *cut0 = cut_in + b * n, *core = core_n + b * n, *peak0 = peak_in + b * n;
        const double *lit = light + b * n;
        const unsigned char *trunc = truncated + b * n;
        /* the end bodies: contiguous from each end, as wide as the body or unlit */
        memset(body, 0, n);
        for (int end = 0; end < 2; end++) {
            if (end_kind[end] == 0) continue;
            double limit = end_width[end] - (0.02 * end_width[end] > 1.0 ? 0.02 * end_width[end] : 1.0);
            for (int64_t i = 0; i < n; i++) {
                int64_t r = end == 0 ? i : n - 1 - i;
                int wide = lit[r] < 0.5 * (1.0 + layout_fraction) || (end_kind[end] == 1 && cut0[r] >= limit);
                if (!wide) break;
                body[r] = 1;
            }
        }
        int64_t start = 0, stop = n;
        while (start < n && body[start]) start++;
        int any_body = 0;
        for (int64_t r = 0; r < n; r++) any_body |= body[r];
        if (start == n) {
            stop = n;
        } else {
            stop = n;
            while (stop > 0 && body[stop - 1]) stop--;
        }
        int64_t face = any_body ? face_px : 0;
        int64_t lo = start + (start > 0 ? face : 0), hi = stop - (stop < n ? face : 0);
        /* widths and contrast scaled to this frame's shadow level */
        double f = fraction[b];
        int scaled = isfinite(f) && f != layout_fraction;
        double g = scaled ? (1.0 - layout_fraction) / (1.0 - f) : 1.0;
        int any_free = 0, all_present = 1, any_present = 0;
        for (int64_t r = 0; r < n; r++) {
            cut[r] = scaled ? (cut0[r] - core[r]) * g + core[r] : cut0[r];
            peak[r] = scaled ? peak0[r] * g : peak0[r];
            centre[r] = centre_in[b * n + r] + band0;
            int present = peak[r] > present_level, free_row = lo <= r && r < hi;
            any_present |= present;
            any_free |= free_row;
            if (free_row && !present) all_present = 0;
            valid[r] = free_row && isfinite(cut[r]) && !trunc[r];
        }
        connected[b] = any_free && all_present;
        seen[b] = any_present;
        double first_face = axial0 + start, last_face = axial0 + stop;
        if (body[0] && body[n - 1]) gap[b] = last_face - first_face;
        else if (end_kind[0] != 0 && body[0]) gap[b] = first_face;
        else if (end_kind[1] != 0 && body[n - 1]) gap[b] = last_face;
        else gap[b] = NAN;
        double frame_slope = axis_slope(y, centre, valid, n, layout_slope, bend);
        /* the thinnest rows: widths smoothed over each valid row and its valid neighbours */
        int64_t n_ok = 0;
        for (int64_t r = 0; r < n; r++) {
            n_ok += valid[r];
            if (!valid[r]) { smooth[r] = INFINITY; continue; }
            double total = cut[r], count = 1.0;
            if (r > 0 && valid[r - 1]) { total += cut[r - 1]; count += 1.0; }
            if (r + 1 < n && valid[r + 1]) { total += cut[r + 1]; count += 1.0; }
            smooth[r] = total / count;
        }
        /* a bead: a swelling with clearly thinner thread on both sides */
        double running = INFINITY;
        for (int64_t r = 0; r < n; r++) { running = smooth[r] < running ? smooth[r] : running; left[r] = running; }
        running = INFINITY;
        int bead = 0;
        for (int64_t r = n - 1; r >= 0; r--) {
            running = smooth[r] < running ? smooth[r] : running;
            double thread = left[r] > running ? left[r] : running;
            if (valid[r] && isfinite(thread) && smooth[r] > 1.6 * thread && smooth[r] > thread + 3.0) bead = 1;
        }
        int64_t i0, mid, half;
        neck_window(smooth, n, row_noise, max_half, min_half, &i0, &mid, &half);
        int measured = connected[b] && n_ok >= 3;
        if (!measured) {
            diameter[b] = position[b] = angle_deg[b] = lateral[b] = min_contrast[b] = NAN;
            fit_rows[b] = 0;
            beads[b] = 0;
            continue;
        }
        /* the fit: rows mid ± half, widths across the local axis over those rows */
        int64_t count = 0;
        for (int64_t r = 0; r < n; r++) {
            sel[r] = valid[r] && mid - half <= r && r <= mid + half;
            count += sel[r];
            valid[r] = sel[r] && isfinite(centre[r]); /* from here on: the rows of the local axis */
        }
        double slope = axis_slope(y, centre, valid, n, frame_slope, bend);
        double cosine = 1.0 / sqrt(1.0 + slope * slope);
        double s0 = 0, s1 = 0, s2 = 0, s3 = 0, s4 = 0, t0 = 0, t1 = 0, t2 = 0;
        double y_min = INFINITY, y_max = -INFINITY;
        for (int64_t r = 0; r < n; r++) {
            if (!sel[r]) continue;
            double x = (double)(r - i0), x2 = x * x, w = cut[r] * cosine;
            s0 += 1.0; s1 += x; s2 += x2; s3 += x2 * x; s4 += x2 * x2;
            t0 += w; t1 += x * w; t2 += x2 * w;
            y_min = x < y_min ? x : y_min;
            y_max = x > y_max ? x : y_max;
        }
        double det = s4 * (s2 * s0 - s1 * s1) - s3 * (s3 * s0 - s1 * s2) + s2 * (s3 * s1 - s2 * s2);
        double scale_det = fabs(s4 * s2 * s0) > 1e-300 ? fabs(s4 * s2 * s0) : 1e-300;
        int solvable = count >= 5 && fabs(det) >= 1e-12 * scale_det;
        double d, shift = 0.0;
        if (solvable) {
            double a = (t2 * (s2 * s0 - s1 * s1) - s3 * (t1 * s0 - s1 * t0) + s2 * (t1 * s1 - s2 * t0)) / det;
            double bb = (s4 * (t1 * s0 - t0 * s1) - t2 * (s3 * s0 - s1 * s2) + s2 * (s3 * t0 - t1 * s2)) / det;
            double c = (s4 * (s2 * t0 - s1 * t1) - s3 * (s3 * t0 - s2 * t1) + t2 * (s3 * s1 - s2 * s2)) / det;
            double vertex = a > 0 ? -bb / (2.0 * a) : NAN;
            if (isfinite(vertex) && y_min <= vertex && vertex <= y_max) {
                d = c - bb * bb / (4.0 * a);
                shift = vertex;
            } else { /* no minimum inside the window: the fit's lowest point in it */
                double lo_end = a * y_min * y_min + bb * y_min + c, hi_end = a * y_max * y_max + bb * y_max + c;
                d = lo_end < c ? lo_end : c;
                d = hi_end < d ? hi_end : d;
            }
        } else {
            d = t0 / count;
        }
        diameter[b] = d;
        position[b] = y[i0] + shift;
        angle_deg[b] = atan(slope) * (180.0 / 3.14159265358979323846);
        lateral[b] = centre[i0];
        min_contrast[b] = peak[i0];
        fit_rows[b] = count;
        beads[b] = bead;
    }
    free(cut); free(smooth); free(y); free(centre); free(left); free(peak);
    free(body); free(valid); free(sel);
    return 0;
}

/* The liquid-shadow remeasurement of the neck rows (thinning/measure/liquid.py: _row_widths,
 * _rim_edge, _thin_rim; same arithmetic, sums in numpy's order): each row's deficit
 * d = 1 - I / (B gain) over the columns [first, first + span) of its frame (the span of
 * numpy's gather, whose column 0 starts the cumulative sums), a row's dark extent against the
 * threshold, its integrated deficit above the background beside it, and its two rim edges. */

/* The numbers of the remeasurement: the layout's (px; depth, threshold and noise as fractions of
 * the light) and liquid.py's rules (in the order of liquid.COMPILED_RULES). */
typedef struct {
    int64_t margin, core, rim_run, baseline, ground_rows;
    double threshold, depth, noise, rim_depth, rim_plateau, thin_peak, thin_dip, thin_floor, fresnel;
} LiquidRules;

/* numpy's pairwise sum of n doubles (the order of ndarray.sum along a contiguous axis). */
static double pairwise_sum(const double *a, int64_t n)
{
    if (n < 8) {
        double res = 0.0;
        for (int64_t i = 0; i < n; i++) res += a[i];
        return res;
    }
    if (n <= 128) {
        double r[8];
        int64_t i;
        for (int j = 0; j < 8; j++) r[j] = a[j];
        for (i = 8; i < n - n % 8; i += 8)
            for (int j = 0; j < 8; j++) r[j] += a[i + j];
        double res = ((r[0] + r[1]) + (r[2] + r[3])) + ((r[4] + r[5]) + (r[6] + r[7]));
        for (; i < n; i++) res += a[i];
        return res;
    }
    int64_t n2 = n / 2;
    n2 -= n2 % 8;
    return pairwise_sum(a, n2) + pairwise_sum(a + n2, n - n2);
}

static double clip_nan(double x, double lo, double hi) /* np.clip: NaN stays NaN */
{
    return x < lo ? lo : (x > hi ? hi : x);
}

/* np.nanmedian of four values (NaN where none is finite). */
static double median4(const double *v)
{
    double s[4];
    int64_t m = 0, finite = 0;
    for (int i = 0; i < 4; i++) {
        if (isnan(v[i])) continue;
        int64_t j = m++;
        for (; j > 0 && s[j - 1] > v[i]; j--) s[j] = s[j - 1];
        s[j] = v[i];
        finite += isfinite(v[i]) != 0;
    }
    switch (finite) {
    case 4: return 0.5 * (s[1] + s[2]);
    case 3: return s[1];
    case 2: return 0.5 * (s[0] + s[1]);
    case 1: return s[0];
    default: return NAN;
    }
}

/* One edge of a row: its sub-pixel position (pixel centres at whole numbers) and whether its rim
 * is resolved, or else thin (see liquid._rim_edge). `edge` the outermost dark pixel on this side,
 * `other` the one on the other side, `inward` +1 for a left edge, -1 for a right one; scratch:
 * three arrays of core + 2 margin + 5 doubles. */
static int rim_edge(const float *d, int64_t w, int64_t edge, int64_t other, int inward,
                    const LiquidRules *rules, double *values, double *weight, double *moment,
                    double *position)
{
    int64_t margin = rules->margin, core = rules->core;
    double depth = rules->depth;
    int64_t k_n = core + 2 * margin + 5, s_first = -(margin + 4), at0 = margin + 4;
    int64_t middle = (edge + other) / 2; /* both >= 0: floor */
    /* steps 0..far reach no further than the middle, 0..near also no deeper than core */
    int64_t far = inward * (middle - edge), near = far < core ? far : core;
    int64_t far_end = at0 + far < k_n - 1 ? at0 + far : k_n - 1, near_end = at0 + near;
    for (int64_t i = 0; i < k_n; i++) {
        int64_t col = edge + inward * (s_first + i);
        values[i] = col >= 0 && col < w ? (double)d[col] : NAN;
    }
    double rim = -INFINITY;
    for (int64_t i = at0; i <= near_end; i++)
        if (!isnan(values[i]) && values[i] > rim) rim = values[i];
    if (rim == -INFINITY) rim = NAN;
    double ground = median4(values);
    if (!isfinite(ground)) ground = 0.0;
    /* partially coherent light: the bright overshoot just outside the edge */
    double dip = NAN;
    for (int64_t i = 4; i < at0; i++)
        if (!isnan(values[i]) && (isnan(dip) || values[i] < dip)) dip = values[i];
    double over = ground - dip;
    over = isnan(over) ? 0.0 : (over == INFINITY ? DBL_MAX : (over == -INFINITY ? -DBL_MAX : over));
    over -= 3.0 * rules->noise;
    over = over < 0.0 ? 0.0 : over;
    double coherent = clip_nan(over / (rules->fresnel - 1.0) / depth, 0.0, 1.0);
    double level = ground + depth * (0.5 + 0.25 * coherent);
    double plateau = ground + rules->rim_plateau * (rim - ground);
    int64_t run = 0;
    for (int64_t i = at0; i <= near_end; i++) run += values[i] >= plateau;
    int64_t first = 0;
    for (int64_t i = 4; i < k_n; i++)
        if (values[i] >= level) { first = i; break; }
    if (first > 0 && isfinite(rim) && rim - ground >= rules->rim_depth * depth && run >= rules->rim_run) {
        double v0 = values[first - 1], v1 = values[first];
        double frac = clip_nan((level - v0) / (v1 - v0), 0.0, 1.0);
        *position = (double)edge + inward * ((double)(s_first + first - 1) + frac);
        if (isfinite(*position)) return 1;
    }
    /* a thin rim: its deficit summed from outside to the dip inward of its peak */
    for (int64_t i = 0; i < k_n; i++) values[i] = isnan(values[i]) ? -INFINITY : values[i] - ground;
    int64_t peak_at = 0;
    double best = -INFINITY;
    for (int64_t i = at0; i <= near_end; i++)
        if (values[i] > best) { best = values[i]; peak_at = i; }
    double peak = values[peak_at];
    int64_t dip_at = 0;
    int any_beyond = 0;
    best = INFINITY;
    for (int64_t i = peak_at + 1 > at0 ? peak_at + 1 : at0; i <= far_end; i++) {
        any_beyond = 1;
        if (values[i] < best) { best = values[i]; dip_at = i; }
    }
    double low = values[dip_at];
    for (int64_t i = 0; i < k_n; i++) {
        double v = i >= 4 && i < dip_at && isfinite(values[i]) ? values[i] : 0.0;
        weight[i] = v;
        moment[i] = v * (double)(s_first + i);
    }
    double half = 0.5 * (isfinite(low) ? low : 0.0);
    double area = pairwise_sum(weight, k_n) + half;
    double centroid = (pairwise_sum(moment, k_n) + half * (double)(s_first + dip_at)) / area;
    double outer = centroid - 0.5 * area / depth;
    *position = (double)edge + inward * outer;
    return any_beyond && isfinite(peak) && isfinite(low) && isfinite(outer)
           && peak >= rules->thin_peak * depth && low <= rules->thin_dip * peak
           && low >= rules->thin_floor * depth && area > 0;
}

/* One row of the remeasurement: its width (px, NaN unless both rims are resolved) and whether
 * they are; the background level beside the thread (NaN without a dark pixel); and the deficit
 * summed over the thread and a margin beyond both ends, `count` columns (see liquid._row_widths).
 * `centre` and `guess` the row pass's centre (span columns) and half-width (px). */
static void liquid_row(const float *d, int64_t w, double centre, double guess,
                       const LiquidRules *rules, double *scratch, double *width,
                       unsigned char *resolved, double *ground, double *sum, int64_t *count)
{
    int64_t m = rules->margin;
    double reach = (isfinite(guess) ? guess : 0.0) + (double)(2 * m) + 3.0; /* liquid._reach */
    double cen = isfinite(centre) ? centre : w / 2.0;
    double lo_at = floor(cen - reach), hi_at = ceil(cen + reach);
    int64_t lo = (int64_t)(lo_at < 0.0 ? 0.0 : (lo_at > w - 1 ? w - 1 : lo_at));
    int64_t hi = (int64_t)(hi_at < 0.0 ? 0.0 : (hi_at > w - 1 ? w - 1 : hi_at));
    float threshold = (float)rules->threshold; /* numpy compares the float32 deficit in float32 */
    int64_t lj = lo, rj = hi;
    while (lj <= hi && !(d[lj] > threshold)) lj++;
    int has = lj <= hi;
    if (has) {
        while (!(d[rj] > threshold)) rj--;
    } else {
        lj = lo;
    }
    /* the sums of the deficit from the span's first column to l0, s0, e0, r1 (numpy's cumsum) */
    int64_t s0 = lj - m > 0 ? lj - m : 0, e0 = rj + m + 1 < w ? rj + m + 1 : w;
    int64_t l0 = s0 - rules->baseline > 0 ? s0 - rules->baseline : 0;
    int64_t r1 = e0 + rules->baseline < w ? e0 + rules->baseline : w;
    int64_t marks[4] = {l0, s0, e0, r1};
    double cum[4], acc = 0.0;
    for (int64_t q = 0, c = 0; q < 4; q++) {
        for (; c < marks[q]; c++) acc += (double)d[c];
        cum[q] = acc;
    }
    double left = s0 > l0 ? (cum[1] - cum[0]) / (double)(s0 - l0) : NAN;
    double right = r1 > e0 ? (cum[3] - cum[2]) / (double)(r1 - e0) : NAN;
    left = isfinite(left) ? left : right;
    right = isfinite(right) ? right : left;
    *ground = has ? 0.5 * (left + right) : NAN;
    *sum = cum[2] - cum[1];
    *count = e0 - s0;
    *width = NAN;
    *resolved = 0;
    if (!has || rj - lj < 2 * rules->rim_run) return;
    int64_t k_n = rules->core + 2 * m + 5;
    double *values = scratch, *weight = scratch + k_n, *moment = scratch + 2 * k_n;
    double left_at, right_at;
    if (!rim_edge(d, w, lj, rj, +1, rules, values, weight, moment, &left_at)) return;
    if (!rim_edge(d, w, rj, lj, -1, rules, values, weight, moment, &right_at)) return;
    *width = right_at - left_at;
    *resolved = 1;
}

/* The integrated deficit above the background of a frame's rows: the background level averaged,
 * NaN ignored, over `size` rows around each (np.convolve "same" windows, summed in order). */
static void liquid_totals(const double *ground, const double *sum, const int64_t *count, int64_t nr,
                          int64_t size, double *totals)
{
    for (int64_t j = 0; j < nr; j++) {
        int64_t a = j - size / 2, b = j + (size - 1) / 2;
        double num = 0.0, den = 0.0;
        for (int64_t i = a > 0 ? a : 0; i <= b && i < nr; i++)
            if (isfinite(ground[i])) { num += ground[i]; den += 1.0; }
        double mean = den > 0 ? num / den : 0.0; /* NaN counts as 0 */
        mean = mean == INFINITY ? DBL_MAX : (mean == -INFINITY ? -DBL_MAX : mean);
        totals[j] = sum[j] - mean * (double)count[j];
    }
}

/* A frame's calibration of the mean deficit: the median (np.nanmedian) of total / width over the
 * resolved rows `near` the neck with a positive width (NaN without any), and how many they are. */
static void liquid_ratio(const double *widths, const unsigned char *resolved, const double *totals,
                         const unsigned char *near, int64_t nr, double *scratch, double *ratio,
                         int64_t *used)
{
    int64_t count = 0, m = 0;
    for (int64_t j = 0; j < nr; j++) {
        if (!(near[j] && resolved[j] && isfinite(widths[j]) && widths[j] > 0)) continue;
        count++;
        double q = totals[j] / widths[j];
        if (!isnan(q)) scratch[m++] = q;
    }
    *used = count;
    if (m == 0) { *ratio = NAN; return; }
    qsort(scratch, m, sizeof(double), compare_double);
    *ratio = (scratch[(m - 1) / 2] + scratch[m / 2]) / 2.0;
}

/* The minimum of a quadratic along the axis through the rows around the thinnest one, of each
 * frame (liquid._neck_fit; sums in numpy's order). Rows: unresolved ones (`in_band`, not
 * `resolved`) take total / calibrated[k]; widths not above 0 are dropped; across the axis:
 * divided by stretch[k]. Diameter NaN where fewer than three rows; 0, or -1 when a row buffer
 * cannot be allocated. */
int liquid_necks(int64_t nf, int64_t nr, const double *widths, const unsigned char *resolved,
                 const double *totals, const unsigned char *in_band, const double *calibrated,
                 const double *stretch, double row_noise, int64_t max_half, int64_t min_half,
                 double *diameter)
{
    double *across = malloc(nr * sizeof(double)), *smooth = malloc(nr * sizeof(double));
    double *terms = malloc(7 * nr * sizeof(double));
    unsigned char *ok = malloc(nr);
    if (!across || !smooth || !terms || !ok) {
        free(across); free(smooth); free(terms); free(ok);
        return -1;
    }
    for (int64_t k = 0; k < nf; k++) {
        int64_t o = k * nr;
        for (int64_t j = 0; j < nr; j++) {
            double v = in_band[o + j] && !resolved[o + j] ? totals[o + j] / calibrated[k] : widths[o + j];
            across[j] = (v > 0 ? v : NAN) / stretch[k];
            ok[j] = in_band[o + j] && isfinite(across[j]);
        }
        /* neck._smooth3: each valid row with its valid neighbours */
        for (int64_t j = 0; j < nr; j++) {
            if (!ok[j]) { smooth[j] = INFINITY; continue; }
            double total = across[j], count = 1.0;
            if (j > 0) { total += ok[j - 1] ? across[j - 1] : 0.0; count += ok[j - 1]; }
            if (j + 1 < nr) { total += ok[j + 1] ? across[j + 1] : 0.0; count += ok[j + 1]; }
            smooth[j] = total / count;
        }
        int64_t i_min, mid, half;
        neck_window(smooth, nr, row_noise, max_half, min_half, &i_min, &mid, &half);
        /* neck.quadratic_fits over the rows mid ± half: the sums of x^p and x^p y, p = 0..2 */
        double *x1 = terms, *x2 = terms + nr, *x3 = terms + 2 * nr, *x4 = terms + 3 * nr;
        double *y0 = terms + 4 * nr, *y1 = terms + 5 * nr, *y2 = terms + 6 * nr;
        int64_t count = 0;
        double y_min = INFINITY, y_max = -INFINITY;
        for (int64_t j = 0; j < nr; j++) {
            int sel = ok[j] && mid - half <= j && j <= mid + half;
            double x = sel ? (double)(j - i_min) : 0.0, y = sel ? across[j] : 0.0, xx = x * x;
            x1[j] = x; x2[j] = xx; x3[j] = xx * x; x4[j] = xx * xx;
            y0[j] = y; y1[j] = x * y; y2[j] = xx * y;
            if (sel) {
                count++;
                y_min = x < y_min ? x : y_min;
                y_max = x > y_max ? x : y_max;
            }
        }
        double n = (double)count, s1 = pairwise_sum(x1, nr), s2 = pairwise_sum(x2, nr);
        double s3 = pairwise_sum(x3, nr), s4 = pairwise_sum(x4, nr);
        double t0 = pairwise_sum(y0, nr), t1 = pairwise_sum(y1, nr), t2 = pairwise_sum(y2, nr);
        double det = s4 * (s2 * n - s1 * s1) - s3 * (s3 * n - s1 * s2) + s2 * (s3 * s1 - s2 * s2);
        double scale = fabs(s4 * s2 * n) > 1e-300 ? fabs(s4 * s2 * n) : 1e-300;
        int solvable = fabs(det) >= 1e-12 * scale;
        det = solvable ? det : 1.0;
        double a = (t2 * (s2 * n - s1 * s1) - s3 * (t1 * n - s1 * t0) + s2 * (t1 * s1 - s2 * t0)) / det;
        double b = (s4 * (t1 * n - t0 * s1) - t2 * (s3 * n - s1 * s2) + s2 * (s3 * t0 - t1 * s2)) / det;
        double c = (s4 * (s2 * t0 - s1 * t1) - s3 * (s3 * t0 - s2 * t1) + t2 * (s3 * s1 - s2 * s2)) / det;
        solvable = solvable && count >= 5;
        double d;
        if (solvable) {
            double vertex = a > 0 ? -b / (2.0 * a) : NAN;
            if (isfinite(vertex) && y_min <= vertex && vertex <= y_max) {
                d = c - b * b / (4.0 * a);
            } else { /* no minimum inside the window: the fit's lowest point in it (NaN stays) */
                double lo_end = a * y_min * y_min + b * y_min + c, hi_end = a * y_max * y_max + b * y_max + c;
                d = isnan(lo_end) || isnan(c) ? NAN : (lo_end < c ? lo_end : c);
                d = isnan(d) || isnan(hi_end) ? NAN : (hi_end < d ? hi_end : d);
            }
        } else {
            d = t0 / n;
        }
        diameter[k] = count >= 3 ? d : NAN;
    }
    free(across); free(smooth); free(terms); free(ok);
    return 0;
}

#define DEFINE_LIQUID(SUFFIX, PIXEL)                                                            \
/* d = 1 - I / (light g) of n pixels, 0 at saturation (float32, as numpy; restrict: the         \
 * compiler vectorises it). */                                                                  \
static void deficit_row_##SUFFIX(const PIXEL *restrict px, const float *restrict light,         \
                                 float g, float sat, int64_t n, float *restrict d)              \
{                                                                                               \
    for (int64_t c = 0; c < n; c++) {                                                           \
        float v = (float)px[c], q = 1.0f - v / (light[c] * g);                                  \
        d[c] = v >= sat ? 0.0f : q;                                                             \
    }                                                                                           \
}                                                                                               \
                                                                                                \
/* The remeasurement of a block's neck rows (see liquid._row_widths). bands[k] the band of frame \
 * k (rows `stride` pixels apart), rows (frame, row) the band row of each neck row, whose       \
 * deficit 1 - I / (backlight gains[k]) is read over columns first[k] .. first[k] + span - 1    \
 * (backlight: band rows of w columns; pixels at saturation carry none); centre and guess       \
 * (frame, row) as liquid_row takes them; `rules` as compiled.liquid_widths passes them; near   \
 * (frame, row) the rows that calibrate. Outputs (frame, row): widths (px), resolved, totals    \
 * (px of full shadow); per frame: the calibration ratio and the rows it used (liquid_ratio).   \
 * Returns 0, or -1 when a buffer cannot be allocated. */                                      \
int liquid_widths_##SUFFIX(const PIXEL *const *bands, int64_t stride, int64_t nf, int64_t w,     \
                           const int64_t *rows, int64_t nr, const int64_t *first, int64_t span, \
                           const double *centre, const double *guess, const float *backlight,  \
                           const float *gains, double saturation, int64_t margin, int64_t core, \
                           double threshold, double depth, double noise, const double *rules,  \
                           const unsigned char *near, double *widths, unsigned char *resolved, \
                           double *totals, double *ratios, int64_t *used)                      \
{                                                                                               \
    LiquidRules r = {margin, core, (int64_t)rules[1], (int64_t)rules[7], (int64_t)rules[8],     \
                     threshold, depth, noise, rules[0], rules[2], rules[3], rules[4], rules[5], \
                     rules[6]};                                                                 \
    float *d = malloc(span * sizeof(float));                                                    \
    double *scratch = malloc(3 * (core + 2 * margin + 5) * sizeof(double));                    \
    double *ground = malloc(nr * sizeof(double)), *sum = malloc(nr * sizeof(double));           \
    double *sorted = malloc(nr * sizeof(double));                                               \
    int64_t *count = malloc(nr * sizeof(int64_t));                                              \
    if (!d || !scratch || !ground || !sum || !sorted || !count) {                               \
        free(d); free(scratch); free(ground); free(sum); free(sorted); free(count);             \
        return -1;                                                                              \
    }                                                                                           \
    float sat = (float)saturation; /* numpy compares float32 pixels in float32 */              \
    for (int64_t k = 0; k < nf; k++) {                                                          \
        float g = gains[k];                                                                     \
        for (int64_t j = 0; j < nr; j++) {                                                      \
            int64_t o = k * nr + j, row = rows[o];                                              \
            const PIXEL *px = bands[k] + row * stride + first[k];                               \
            const float *light = backlight + row * w + first[k];                                \
            deficit_row_##SUFFIX(px, light, g, sat, span, d);                                    \
            liquid_row(d, span, centre[o], guess[o], &r, scratch, widths + o, resolved + o,     \
                       ground + j, sum + j, count + j);                                         \
        }                                                                                       \
        liquid_totals(ground, sum, count, nr, r.ground_rows, totals + k * nr);                  \
        liquid_ratio(widths + k * nr, resolved + k * nr, totals + k * nr, near + k * nr, nr,    \
                     sorted, ratios + k, used + k);                                             \
    }                                                                                           \
    free(d); free(scratch); free(ground); free(sum); free(sorted); free(count);                 \
    return 0;                                                                                   \
}

DEFINE_KERNELS(u8, uint8_t)
DEFINE_KERNELS(u16, uint16_t)
DEFINE_LIQUID(u8, uint8_t)
DEFINE_LIQUID(u16, uint16_t)

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_rowscan",
                                    "Compiled row pass of thinning.edges (used through ctypes).",
                                    -1, NULL};

PyMODINIT_FUNC PyInit__rowscan(void) { return PyModule_Create(&module); }
